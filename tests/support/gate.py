"""A TCP relay on 127.0.0.1 that a test can shut and reopen: an endpoint that goes down and
comes back on the same address, while the server behind it keeps its state.

``Gate(target_port)`` listens on an ephemeral port of its own and relays each connection to the
target. ``shut()`` stops listening and drops the open connections, so clients see connection
refused, exactly as when the server itself is down; ``reopen()`` listens on the same port again.
"""

from __future__ import annotations

import contextlib
import socket
import threading


class Gate:
    def __init__(self, target_port: int) -> None:
        self.target = ("127.0.0.1", target_port)
        self._lock = threading.Lock()
        self._open: list[socket.socket] = []
        self._listener: socket.socket | None = None
        self.port = 0
        self.reopen()

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def reopen(self) -> None:
        listener = socket.socket()
        listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        listener.bind(("127.0.0.1", self.port))
        listener.listen(64)
        self.port = listener.getsockname()[1]
        self._listener = listener
        threading.Thread(target=self._accept, args=(listener,), daemon=True).start()

    def shut(self) -> None:
        with self._lock:
            listener, self._listener = self._listener, None
            conns, self._open = self._open, []
        if listener is not None:
            with contextlib.suppress(OSError):
                listener.shutdown(socket.SHUT_RDWR)
            listener.close()
        for conn in conns:
            with contextlib.suppress(OSError):
                conn.shutdown(socket.SHUT_RDWR)
            conn.close()

    def _accept(self, listener: socket.socket) -> None:
        while True:
            try:
                client, _ = listener.accept()
            except OSError:
                return  # shut
            try:
                upstream = socket.create_connection(self.target, timeout=10)
            except OSError:
                client.close()
                continue
            with self._lock:
                if self._listener is not listener:  # shut while connecting
                    client.close()
                    upstream.close()
                    return
                self._open += [client, upstream]
            for a, b in ((client, upstream), (upstream, client)):
                threading.Thread(target=_pump, args=(a, b), daemon=True).start()


def _pump(src: socket.socket, dst: socket.socket) -> None:
    try:
        while data := src.recv(65536):
            dst.sendall(data)
    except OSError:
        pass
    finally:
        with contextlib.suppress(OSError):
            dst.shutdown(socket.SHUT_WR)
