"""The summary of a learning run: the facts other tools rely on, and details.

The contract (``sapwood learn --summary FILE``): at least records, learned, quarantined,
task, accuracy and kappa (classification) or mae, rmse and r2 (regression), leaves,
depth, drift_alarms, seconds and records_per_second. ``seconds`` runs from opening the
source to the end of the reading; for a live feed (a followed file, a broker) to its last
records, so the quiet spell that ends it is not counted.
"""

from __future__ import annotations

from typing import Any

from connectors.broker_payloads import redacted

from .outputs import iso


def tree_facts(model) -> dict:
    """Size and drift counters of a tree."""
    return {"nodes": model.n_nodes, "leaves": model.n_leaves,
            "active_leaves": model.n_active_leaves, "depth": model.depth,
            **model.counters()}


def rules_header(run: Any) -> dict:
    """Facts that head a rule listing or snapshot of ``run``."""
    task, encoder = run.task, run.encoder
    header = {"target": run.job.target,
              "task": task.name if task else None,
              "classes": encoder.classes if encoder else [],
              "records": task.records_learned if task else 0,
              "data_time": iso(run.last_time) if run.last_time is not None else None}
    if task is not None:
        header.update(task.headline(task.result(encoder)))
    if encoder is not None:
        header["decimals"] = dict(encoder.decimals)  # how the text forms print thresholds
    if header.get("concern") is None and run.job.concern is not None:
        header["concern"] = run.job.concern  # declared, not seen yet (or a numeric target's)
    return header


def run_summary(run: Any) -> dict:
    """The summary of ``run`` (a :class:`~stream.run.engine.LearnRun`) as it stands."""
    job, task, outputs = run.job, run.task, run.outputs
    seconds = run.prior_seconds + max(run.finished - run.started, 0.0)
    m = run.model
    drift = m.counters() if m else {}
    summary = {
        "records": run.records,
        "learned": task.records_learned if task else 0,
        "quarantined": outputs.quarantine.count,
        "task": run.schema.task if run.schema else None,
        "target": job.target,
    }
    if task is not None:
        summary.update(task.summary_figures(task.result(run.encoder)))
    elif (job.task or "classification") == "classification":
        summary.update({"accuracy": None, "kappa": None})
    else:
        summary.update({"mae": None, "rmse": None, "r2": None})
    settings = task.settings if task else None
    checkpoint = run.checkpoint
    summary.update({
        "leaves": m.n_leaves if m else 0, "depth": m.depth if m else 0,
        "drift_alarms": drift.get("drift_alarms", 0),
        "swaps": drift.get("alternates_swapped", 0),
        "alternates_started": drift.get("alternates_started", 0),
        "alternates_dropped": drift.get("alternates_dropped", 0),
        "detector": getattr(settings, "detector", "off") if settings else None,
        "seconds": round(seconds, 6),
        "records_per_second": round(run.records / seconds, 1) if seconds > 0 else None,
        "startup_seconds": round(run.startup_seconds, 3),
        "window": job.window,
        "classes": run.encoder.classes if run.encoder else [],
        "tree": tree_facts(m) if m else None,
        "schema": run.schema.to_dict() if run.schema else None,
        "unknown_fields": dict(run.encoder.unknown_fields) if run.encoder else {},
        "text_in_numbers": dict(run.notices.text_in_numbers),
        "pooled_values": run.encoder.pooled if run.encoder else {},
        "beyond_class_cap": run.notices.beyond_class_cap,
        "sources": [redacted(spec) for spec in job.sources],
        "stopped": run.stopped,
        "checkpoint": None if checkpoint is None else {
            "path": job.checkpoint_path, "written": checkpoint.written,
            "resumes": run.resumes, "resumed_at_records": run.resumed_at,
            "last": checkpoint.last},
        "labels": run.delayed.summary() if run.delayed is not None else None,
        "alerts": run.alerts.counts() if run.alerts is not None else None,
        "outputs": {
            "quarantine": outputs.quarantine.path if outputs.quarantine.count else None,
            "snapshots": job.snapshot_dir if outputs.snapshots_written else None,
            "metrics": job.metrics_path, "events": job.events_path,
            "model": job.save_path if run.saved else None,
            "predictions": redacted(job.predictions_path)
            if job.predictions_path else None,
        },
    })
    return summary
