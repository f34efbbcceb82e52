"""Where a run's records come from: its sources opened for the job (sought to the position
a resumed checkpoint holds), and the schema inferred from the first records when it is
not declared."""

from __future__ import annotations

from typing import Sequence

import numpy as np
import pandas as pd

from connectors.base import RawBatch, Source
from connectors.follow import FollowControl
from connectors.sources import open_sources
from stream.errors import ConfigError

from .job import INFER_ROWS, LearnJob
from .schema import Schema, infer_schema
from .values import missing_mask


def batch_rows_for(job: LearnJob) -> int:
    """Records per batch: checkpoints fall between batches, so no batch may outgrow the
    checkpoint interval."""
    if job.checkpoint_path and job.checkpoint_every:
        return min(job.batch_rows, job.checkpoint_every)
    return job.batch_rows


def open_run_source(job: LearnJob, follow: FollowControl | None,
                    position: dict | None) -> Source:
    """The job's sources as one stream of batches, sought to ``position`` if given."""
    source = open_sources(job.sources, job.fmt, batch_rows_for(job), follow=follow,
                          header=job.header)
    if job.checkpoint_path and not getattr(source, "resumable", True) \
            or job.checkpoint_path and not hasattr(source, "seek"):
        source.close()
        raise ConfigError("a checkpoint needs sources it can return to (files or a "
                          "broker); standard input cannot be read again")
    if position is not None:
        source.seek(position)
    return source


def held_enough(pending: Sequence[RawBatch]) -> bool:
    """Whether the batches held back for schema inference hold ``INFER_ROWS`` records."""
    return sum(len(b) for b in pending) >= INFER_ROWS


def infer_run_schema(pending: Sequence[RawBatch], job: LearnJob,
                     labels_later: bool) -> Schema:
    """The schema of the first ``INFER_ROWS`` records of ``pending``, whatever the batch
    size. ``labels_later``: the records may carry no target (their labels come from
    another source), so the task must be given."""
    frames = [b.frame for b in pending if len(b.frame)]
    if not frames:     # nothing but rejects so far: infer from what there is
        frames = [pending[0].frame]
    prefix = pd.concat(frames, ignore_index=True).iloc[:INFER_ROWS]
    if any(b.keyed for b in pending):
        prefix = _keys_of_prefix(prefix, job)
    if labels_later and job.target not in prefix.columns:
        if job.task is None:
            raise ConfigError(f"the records carry no {job.target!r} (their labels "
                              f"come from --labels): give --task or --schema")
        prefix = prefix.assign(**{job.target: np.nan})
    return infer_schema(prefix, job.target, job.task, job.declared)


def _keys_of_prefix(prefix: pd.DataFrame, job: LearnJob) -> pd.DataFrame:
    """Records that name their fields: the schema holds the keys with a value in the
    first ``INFER_ROWS`` records, and the declared ones. A batch holding later records
    too has columns for keys only those carry; without this, a key first seen after the
    inference rows would join the schema or not depending on the batch size."""
    wanted = set(job.declared) | {job.target}
    empty = [c for c in prefix.columns
             if str(c) not in wanted and not (~missing_mask(prefix[c])).any()]
    prefix = prefix.drop(columns=empty)
    absent = [name for name in job.declared if name not in prefix.columns]
    return prefix.assign(**{name: np.nan for name in absent}) if absent else prefix
