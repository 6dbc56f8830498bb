"""A local OpenAI-compatible ``POST /v1/embeddings`` server for the HTTP embedder's tests.

It listens on 127.0.0.1 on an ephemeral port, in a background thread, and answers with the
default model's real vectors (``pipeline.embedding.default_embedder()``), so what comes back
through HTTP can be compared with the model run in-process. The answer shape follows OpenAI's
embeddings API reference (from memory): ``{"object": "list", "data": [{"object": "embedding",
"index": i, "embedding": [...]}], "model": ..., "usage": {...}}``, and errors are
``{"error": {"message": ..., "type": ...}}``.

Real checks: a missing or wrong bearer key is a 401 (when the server has a key), an unknown model
a 404, a body whose ``input`` is not a non-empty list of non-empty strings a 400. Faults can be
injected for chosen requests: any status (429 with Retry-After, 500, ...), a slow answer, or a
hang that closes the connection without answering. The server counts, per text, how many times it
answered it with a vector, and records every request it saw.

Use it as a context manager; leaving it stops the listener and joins every handler thread.
"""

from __future__ import annotations

import json
import threading
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

import numpy as np

from pipeline.embedding.onnx import default_embedder

EMBEDDINGS_PATH = "/v1/embeddings"


@dataclass
class Fault:
    """What to do to a matching request instead of (or before) answering it normally.

    ``status``: answer with this status and an OpenAI-style error body. ``retry_after``: the
    Retry-After header to send with it. ``delay``: seconds to wait first. ``drop``: after the
    delay, close the connection without answering (a server that hung).
    """

    status: int | None = None
    retry_after: str | None = None
    delay: float = 0.0
    drop: bool = False
    message: str = "injected fault"


@dataclass
class _Injection:
    fault: Fault
    remaining: int
    matches: Callable[[list[str]], bool] | None


@dataclass(frozen=True)
class SeenRequest:
    """One request as the server saw it and what it did with it."""

    texts: tuple[str, ...]
    authorization: str | None
    outcome: str  # "200", "429", ..., "dropped"


@dataclass
class _State:
    embedded: Counter[str] = field(default_factory=Counter)
    requests: list[SeenRequest] = field(default_factory=list)
    in_flight: int = 0
    max_in_flight: int = 0


class EmbeddingServer:
    """OpenAI-compatible embeddings on 127.0.0.1:<ephemeral>, serving the default model."""

    def __init__(self, *, model: str = "marrowby-minilm", api_key: str | None = None) -> None:
        self.model = model
        self.api_key = api_key
        #: When set, vectors are cut to this many components (to fake a changed model).
        self.serve_dimension: int | None = None
        #: When true, the rows of each answer are listed in reverse (their "index" stays right).
        self.reverse_rows = False
        self._embedder = default_embedder()
        self._embed_lock = threading.Lock()  # one model run at a time: 2 shared cores
        self._lock = threading.Lock()
        self._state = _State()
        self._injections: list[_Injection] = []
        self._stopping = threading.Event()
        self._httpd = ThreadingHTTPServer(("127.0.0.1", 0), self._handler_class())
        # Handler threads are joined on close (not daemons), so a test leaves nothing running.
        self._httpd.daemon_threads = False
        self._httpd.block_on_close = True
        self._thread = threading.Thread(
            target=self._httpd.serve_forever,
            kwargs={"poll_interval": 0.05},
            name="embedding-server",
        )

    # --- lifecycle ---------------------------------------------------------------------------

    @property
    def url(self) -> str:
        host, port = self._httpd.server_address[:2]
        return f"http://{host}:{port}"

    def __enter__(self) -> EmbeddingServer:
        self._thread.start()
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.stop()

    def stop(self) -> None:
        """Stop listening, wake any delayed handler, and join every thread (bounded)."""
        self._stopping.set()
        if self._thread.is_alive():
            self._httpd.shutdown()
            self._thread.join(timeout=10)
        self._httpd.server_close()

    # --- control and observation -------------------------------------------------------------

    def inject(
        self,
        fault: Fault,
        times: int = 1,
        matches: Callable[[list[str]], bool] | None = None,
    ) -> None:
        """Apply ``fault`` to the next ``times`` requests (that ``matches`` accepts, if given)."""
        with self._lock:
            self._injections.append(_Injection(fault, times, matches))

    @property
    def embedded(self) -> Counter[str]:
        """How many times each text was answered with a vector."""
        with self._lock:
            return Counter(self._state.embedded)

    @property
    def requests(self) -> list[SeenRequest]:
        with self._lock:
            return list(self._state.requests)

    @property
    def max_in_flight(self) -> int:
        """The most requests the server was handling at once."""
        with self._lock:
            return self._state.max_in_flight

    # --- serving -----------------------------------------------------------------------------

    def _take_fault(self, texts: list[str]) -> Fault | None:
        with self._lock:
            for injection in self._injections:
                if injection.remaining > 0 and (
                    injection.matches is None or injection.matches(texts)
                ):
                    injection.remaining -= 1
                    return injection.fault
        return None

    def _record(self, texts: Sequence[str], authorization: str | None, outcome: str) -> None:
        with self._lock:
            self._state.requests.append(SeenRequest(tuple(texts), authorization, outcome))
            if outcome == "200":
                self._state.embedded.update(texts)

    def _vectors(self, texts: list[str]) -> np.ndarray:
        with self._embed_lock:
            vectors = self._embedder.embed(texts)
        if self.serve_dimension is not None:
            vectors = vectors[:, : self.serve_dimension]
        return vectors

    def _handler_class(self) -> type[BaseHTTPRequestHandler]:
        server = self

        class Handler(BaseHTTPRequestHandler):
            def log_message(self, format: str, *args: Any) -> None:  # noqa: A002
                pass  # keep test output clean

            def _leave(self) -> None:
                """The request stops counting as in flight before its answer is written: the
                client may send its next request as soon as it has read this answer."""
                if self._in_flight:
                    self._in_flight = False
                    with server._lock:
                        server._state.in_flight -= 1

            def _send_json(self, status: int, body: dict[str, Any], headers: dict[str, str]):
                data = json.dumps(body).encode("utf-8")
                self._leave()
                self.send_response(status)
                self.send_header("Content-Type", "application/json")
                self.send_header("Content-Length", str(len(data)))
                for name, value in headers.items():
                    self.send_header(name, value)
                self.end_headers()
                self.wfile.write(data)

            def _error(self, status: int, message: str, kind: str, **headers: str) -> None:
                self._send_json(status, {"error": {"message": message, "type": kind}}, headers)

            def do_POST(self) -> None:  # noqa: N802 (the stdlib's naming)
                with server._lock:
                    server._state.in_flight += 1
                    server._state.max_in_flight = max(
                        server._state.max_in_flight, server._state.in_flight
                    )
                self._in_flight = True
                try:
                    self._answer()
                finally:
                    self._leave()

            def _answer(self) -> None:
                length = int(self.headers.get("Content-Length") or 0)
                raw = self.rfile.read(length)
                auth = self.headers.get("Authorization")
                try:
                    body = json.loads(raw)
                except ValueError:
                    body = None
                texts = body.get("input") if isinstance(body, dict) else None
                seen = texts if isinstance(texts, list) else []
                if self.path != EMBEDDINGS_PATH:
                    server._record(seen, auth, "404")
                    self._error(404, f"no route {self.path}", "invalid_request_error")
                    return
                if server.api_key is not None and auth != f"Bearer {server.api_key}":
                    server._record(seen, auth, "401")
                    self._error(401, "the API key is missing or not valid", "authentication")
                    return
                if not (
                    isinstance(texts, list)
                    and texts
                    and all(isinstance(text, str) and text for text in texts)
                ):
                    server._record(seen, auth, "400")
                    self._error(
                        400,
                        "'input' must be a non-empty list of non-empty strings",
                        "invalid_request_error",
                    )
                    return
                if body.get("model") != server.model:
                    server._record(seen, auth, "404")
                    self._error(
                        404, f"model {body.get('model')!r} does not exist", "invalid_request_error"
                    )
                    return
                fault = server._take_fault(texts)
                if fault is not None and fault.drop:
                    # Recorded on arrival: the client has usually given up before the hang ends.
                    server._record(texts, auth, "dropped")
                    server._stopping.wait(fault.delay)
                    self.close_connection = True
                    return
                if fault is not None:
                    if fault.delay and server._stopping.wait(fault.delay):
                        server._record(texts, auth, "dropped")  # stopping: just go away
                        self.close_connection = True
                        return
                    if fault.status is not None:
                        server._record(texts, auth, str(fault.status))
                        headers = {"Retry-After": fault.retry_after} if fault.retry_after else {}
                        self._error(fault.status, fault.message, "injected", **headers)
                        return
                vectors = server._vectors(texts)
                rows = [
                    {"object": "embedding", "index": i, "embedding": vectors[i].tolist()}
                    for i in range(len(texts))
                ]
                if server.reverse_rows:
                    rows.reverse()
                tokens = sum(server._embedder.tokens.count(texts))
                server._record(texts, auth, "200")
                self._send_json(
                    200,
                    {
                        "object": "list",
                        "data": rows,
                        "model": server.model,
                        "usage": {"prompt_tokens": tokens, "total_tokens": tokens},
                    },
                    {},
                )

        return Handler
