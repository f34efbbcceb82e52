"""Reading ahead: the next batch of a file or pipe is read and parsed on a thread of its
own while the learner works on the current one.

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
from typing import Iterator

from connectors.base import RawBatch

_BATCH, _END, _ERROR = range(3)


class ReadAhead:
    """Iterate ``batches`` one batch ahead on a background thread; :meth:`close` stops
    the thread (after the read in progress) and must be called before the source is
    closed."""

    def __init__(self, batches: Iterator[RawBatch]) -> None:
        self._queue: queue.Queue = queue.Queue(maxsize=1)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._read, args=(batches,), daemon=True,
                                        name="sapwood-read-ahead")
        self._thread.start()

    def _read(self, batches: Iterator[RawBatch]) -> None:
        try:
            for batch in batches:
                if not self._put((_BATCH, batch)):
                    return
            self._put((_END, None))
        except BaseException as exc:   # noqa: BLE001 - handed to the reading thread as is
            self._put((_ERROR, exc))

    def _put(self, item: tuple) -> bool:
        while not self._stop.is_set():
            try:
                self._queue.put(item, timeout=0.05)
                return True
            except queue.Full:
                continue
        return False

    def __iter__(self) -> Iterator[RawBatch]:
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
