"""Reading ahead: the next batch of a file or pipe is read and parsed on a thread of its
own while the learner works on the current one; once the run knows its schema, the
thread also reads the batch's columns (:func:`stream.run.encoding.prepare_columns`: numbers
parsed, labels factorised), leaving only the codes to the run's own thread.

The parser (pandas' C reader, sapwood's record scanner) and the learning kernel both
release the GIL for most of their work, so on two cores reading overlaps learning. One
batch is held ahead at most, so memory grows by one batch. Batches, and an error the
reading ends with, arrive in the order read. Only for sources read to their end by one
reader: live feeds (followed files, brokers) call back into the run while they wait and
acknowledge what was learned, so they are read on the run's own thread.
"""

from __future__ import annotations

import queue
import threading
from typing import Any, Callable, Iterator

from connectors.base import RawBatch

_BATCH, _END, _ERROR = range(3)


class ReadAhead:
    """Iterate ``batches`` one batch ahead on a background thread, as (batch, prepared)
    pairs: ``prepared`` is what the function given to :meth:`prepare_with` made of the
    batch, or None (no function yet, or it failed: the run then does the work itself
    and meets the failure in order). :meth:`close` stops the thread (after the read in
    progress) and must be called before the source is closed."""

    def __init__(self, batches: Iterator[RawBatch]) -> None:
        self._queue: queue.Queue = queue.Queue(maxsize=1)
        self._stop = threading.Event()
        self._prepare: Callable[[RawBatch], Any] | None = None
        self._thread = threading.Thread(target=self._read, args=(batches,), daemon=True,
                                        name="sapwood-read-ahead")
        self._thread.start()

    def _read(self, batches: Iterator[RawBatch]) -> None:
        try:
            for batch in batches:
                if not self._put((_BATCH, (batch, self._prepared(batch)))):
                    return
            self._put((_END, None))
        except BaseException as exc:   # noqa: BLE001 - handed to the reading thread as is
            self._put((_ERROR, exc))

    def prepare_with(self, prepare: Callable[[RawBatch], Any]) -> None:
        """Apply ``prepare`` (pure: it runs beside the learner) to every batch read from
        now on."""
        self._prepare = prepare

    @property
    def preparing(self) -> bool:
        """Whether batches are prepared on the reading thread."""
        return self._prepare is not None

    def _prepared(self, batch: RawBatch) -> Any:
        prepare = self._prepare
        if prepare is None:
            return None
        try:
            return prepare(batch)
        except Exception:    # noqa: BLE001 - the run's own thread redoes it and reports
            return None

    def _put(self, item: tuple) -> bool:
        while not self._stop.is_set():
            try:
                self._queue.put(item, timeout=0.05)
                return True
            except queue.Full:
                continue
        return False

    def __iter__(self) -> Iterator[tuple[RawBatch, Any]]:
        while True:
            kind, item = self._queue.get()
            if kind == _BATCH:
                yield item
            elif kind == _END:
                return
            else:
                raise item

    def close(self) -> None:
        self._stop.set()
        while self._thread.is_alive():
            try:                          # make room for a put in progress
                self._queue.get(timeout=0.05)
            except queue.Empty:
                pass
        self._thread.join()
