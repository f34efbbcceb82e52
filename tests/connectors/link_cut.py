"""A loopback TCP relay whose link can be cut, for tests of a source behind a bad network.

While the link is cut, bytes a client sends are held (TCP would retransmit them once
the link is back, so they are late, not lost), nothing reaches the clients, and new
connections are closed at once. When the link comes back, new connections are relayed;
each connection open during the cut stays dead to its client, and the bytes it held
reach the server ``late`` seconds later, as a retransmission would.
"""

from __future__ import annotations

import socket
import threading
import time


class CutLink:
    """Relay 127.0.0.1:``port`` -> 127.0.0.1:``upstream``; :meth:`cut` and :meth:`restore`."""

    def __init__(self, upstream: int) -> None:
        self.upstream = upstream
        self._listener = socket.create_server(("127.0.0.1", 0))
        self.port = self._listener.getsockname()[1]
        self._lock = threading.Lock()
        self._cut = False
        self._pairs: list[dict] = []
        self._threads: list[threading.Thread] = []
        self._stopped = False
        self._start(self._accept)

    def _start(self, target, *args) -> None:
        thread = threading.Thread(target=target, args=args, daemon=True)
        thread.start()
        self._threads.append(thread)

    def _accept(self) -> None:
        while not self._stopped:
            try:
                client, _ = self._listener.accept()
            except OSError:
                return
            with self._lock:
                cut = self._cut
            if cut:
                client.close()
                continue
            server = socket.create_connection(("127.0.0.1", self.upstream))
            pair = {"client": client, "server": server, "held": bytearray(), "dead": False}
            with self._lock:
                self._pairs.append(pair)
            self._start(self._up, pair)
            self._start(self._down, pair)

    def _up(self, pair: dict) -> None:
        self._pump(pair, "client", "server", hold=True)

    def _down(self, pair: dict) -> None:
        self._pump(pair, "server", "client", hold=False)

    def _pump(self, pair: dict, source: str, sink: str, hold: bool) -> None:
        """Relay ``source`` to ``sink``; while cut (or for a connection of the cut)
        bytes to the server are held, bytes to the client lost."""
        while True:
            try:
                data = pair[source].recv(65536)
            except OSError:
                return
            if not data:
                return
            with self._lock:
                if self._cut or pair["dead"]:
                    if hold:
                        pair["held"] += data
                    continue
            try:
                pair[sink].sendall(data)
            except OSError:
                return

    def cut(self) -> None:
        with self._lock:
            self._cut = True
            for pair in self._pairs:
                pair["dead"] = True

    def restore(self, late: float) -> None:
        """New connections work again; held bytes reach the server ``late`` s later."""
        with self._lock:
            self._cut = False
            old = [p for p in self._pairs if p["dead"]]
        self._start(self._deliver_late, old, late)

    def _deliver_late(self, pairs: list[dict], late: float) -> None:
        time.sleep(late)
        for pair in pairs:
            with self._lock:
                held, pair["held"] = bytes(pair["held"]), bytearray()
            if held:
                try:
                    pair["server"].sendall(held)
                except OSError:
                    pass        # the server closed that connection: nothing executes

    def stop(self) -> None:
        self._stopped = True
        self._listener.close()
        with self._lock:
            pairs = list(self._pairs)
        for pair in pairs:
            for end in ("client", "server"):
                try:
                    pair[end].close()
                except OSError:
                    pass
        for thread in self._threads:
            thread.join(timeout=2)
