"""Scoring with a saved model: predictions for new records, nothing learned."""

from __future__ import annotations

import sys

from connectors.sources import open_sources

from .job import DEFAULT_QUARANTINE
from .outputs import PredictionFile, QuarantineFile
from .saved_model import load_model
from .tasks import warm_up


def score_sources(model_path: str, sources: list[str], fmt: str | None,
                  predictions_path: str, quarantine_path: str | None) -> str:
    """Write predictions for ``sources``; returns a one-line report for people.

    Records whose target is present are also counted for an accuracy figure; records
    without one are simply predicted.
    """
    saved = load_model(model_path)
    warm_up()
    encoder, task = saved.encoder, saved.task
    sink = PredictionFile(predictions_path, sys.stdout)
    quarantine = QuarantineFile(quarantine_path or DEFAULT_QUARANTINE)
    scored_total = labelled = 0
    correct = 0.0
    source = open_sources(sources, fmt)
    try:
        for batch in source.batches():
            encoded = encoder.encode(batch, scoring=True)
            quarantine.write(sorted(encoded.rejects, key=lambda r: (r.line, r.field or "")))
            if not len(encoded):
                continue
            scored = task.predict(encoded.X)
            sink.write(encoded, task.prediction_columns(scored, encoder))
            known = task.labelled(encoded.y)
            labelled += int(known.sum())
            if known.any():
                correct += task.correct(encoded.y[known], _subset(scored, known))
            scored_total += len(encoded)
    finally:
        source.close()
        sink.close()
        quarantine.close()
    report = f"sapwood: scored {scored_total:,} records"
    if labelled and task.name == "classification":
        report += f"; {labelled:,} carried a label, accuracy {100 * correct / labelled:.1f}%"
    elif labelled:
        report += f"; {labelled:,} carried a target, mean absolute error " \
                  f"{correct / labelled:.4g}"
    if quarantine.count:
        report += f"; {quarantine.count:,} quarantined in {quarantine.path}"
    return report


def _subset(scored, mask):
    """The scored records where ``mask`` holds (any Scored-like dataclass)."""
    import dataclasses

    return type(scored)(**{f.name: getattr(scored, f.name)[mask]
                           for f in dataclasses.fields(scored)})
