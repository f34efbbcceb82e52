"""sapwood's engine: a streaming Hoeffding tree that scores each record, then learns from it."""
