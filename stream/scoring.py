"""Scoring with a saved model: predictions for new records, nothing learned."""

from __future__ import annotations

import sys


from connectors.sources import open_sources

from .engine import _LazyQuarantine, _PredictionSink, warm_up
from .saved_model import load_model


def score_sources(model_path: str, sources: list[str], fmt: str | None,
                  predictions_path: str, quarantine_path: str | None) -> str:
    """Write predictions for ``sources``; returns a one-line report for people.

    Records whose target is present are also counted for an accuracy figure; records
    without one are simply predicted.
    """
    saved = load_model(model_path)
    warm_up()
    encoder, model = saved.encoder, saved.model
    sink = _PredictionSink(predictions_path, sys.stdout)
    quarantine = _LazyQuarantine(quarantine_path or "sapwood-quarantine.jsonl")
    scored_total = labelled = correct = 0
    source = open_sources(sources, fmt)
    try:
        for batch in source.batches():
            encoded = encoder.encode(batch, scoring=True)
            quarantine.write(encoded.rejects)
            if not len(encoded):
                continue
            scored = model.predict(encoded.X)
            sink.write(encoded, model.classes_, scored, 0)
            known = encoded.y >= 0
            labelled += int(known.sum())
            correct += int((scored.pred[known] == encoded.y[known]).sum())
            scored_total += len(encoded)
    finally:
        source.close()
        sink.close()
        quarantine.close()
    report = f"sapwood: scored {scored_total:,} records"
    if labelled:
        report += f"; {labelled:,} carried a label, accuracy {100 * correct / labelled:.1f}%"
    if quarantine.count:
        report += f"; {quarantine.count:,} quarantined in {quarantine.path}"
    return report
