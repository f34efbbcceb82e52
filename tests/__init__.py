"""sapwood's tests; tests/README.md says how they check sapwood against the outside."""
