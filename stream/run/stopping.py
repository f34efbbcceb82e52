"""Stopping a run by signal: the first SIGINT or SIGTERM asks the run to stop after the
batch it is learning (it then checkpoints and writes its summary); a second interrupts
at once."""

from __future__ import annotations

import signal
import threading


class StopsOnSignal:
    """Mixed into a run that has ``stop`` (a :class:`threading.Event`) and ``stopped``
    (the signal's name once one came)."""

    stop: threading.Event
    stopped: str | None

    def _catch_signals(self) -> dict:
        """SIGINT/SIGTERM ask the run to stop (main thread only); returns the handlers
        to put back."""
        if threading.current_thread() is not threading.main_thread():
            return {}
        previous = {}
        for signum in (signal.SIGINT, signal.SIGTERM):
            previous[signum] = signal.signal(signum, self._on_signal)
        return previous

    def _on_signal(self, signum, frame) -> None:
        if self.stop.is_set():
            raise KeyboardInterrupt  # a second signal: stop now
        self.stopped = signal.Signals(signum).name
        self.stop.set()
