"""An embedder that sends texts to an OpenAI-compatible ``POST /v1/embeddings`` endpoint.

Spec form (see :func:`pipeline.embedding.make_embedder`): ``http:BASE_URL,MODEL[,KEY_ENV]``, for
example ``http:https://embed.marrowby.example,minilm-l6,MARROWBY_EMBED_KEY``. The key is read from
the named environment variable when the embedder is built and sent as ``Authorization: Bearer``;
the key itself is never recorded anywhere.

HTTP is done with the standard library (``urllib.request``), so this adds no dependency.

Guarantees, on top of the :class:`pipeline.embedding.Embedder` protocol:

- every text of a call is sent at least once and its vector comes back in input order, whatever
  order the batches finish in and whatever order the server lists rows in (rows are placed by
  their ``index`` field);
- a text that appears several times in one call is sent once;
- a 429, a 5xx, a timeout or a dropped connection is retried with exponential backoff and full
  jitter, waiting at least what ``Retry-After`` asks for; a 400, 401 or other 4xx is not retried
  and raises :class:`EmbedderError` naming the status and the server's own message;
- every row of every answer must have the dimension of the first answer (or the configured
  one); vectors are L2-normalised here, whatever the server does;
- chunk budgets are counted with the bundled tokenizer (:class:`TokenCounter`), an estimate of
  what the server's model sees: set ``max_input_tokens`` to what the remote model accepts.
"""

from __future__ import annotations

import email.utils
import http.client
import json
import logging
import os
import random
import socket
import ssl
import threading
import time
import urllib.error
import urllib.parse
import urllib.request
from collections.abc import Callable, Sequence
from concurrent.futures import FIRST_EXCEPTION, Future, ThreadPoolExecutor, wait
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.embedding.base import file_sha256
from pipeline.errors import EmbedderError
from pipeline.tokens import TokenCounter

log = logging.getLogger("upwell.embedding")

#: OpenAI's embeddings endpoint takes up to 2,048 inputs per request (from memory); 64 keeps
#: each request small enough that one retry repeats little work.
DEFAULT_BATCH_SIZE = 64
#: Token estimate per request, counted with the bundled tokenizer; OpenAI's per-request limit
#: is about 8,191 tokens for its v3 embedding models (from memory).
DEFAULT_MAX_BATCH_TOKENS = 8_000
DEFAULT_CONCURRENCY = 2
#: Same budget as the default model (256 minus [CLS] and [SEP]).
DEFAULT_MAX_INPUT_TOKENS = 254
DEFAULT_TIMEOUT = 60.0
DEFAULT_MAX_ATTEMPTS = 6
DEFAULT_BACKOFF_BASE = 0.5
DEFAULT_BACKOFF_CAP = 30.0
#: A Retry-After longer than this is shortened to it, so one answer cannot stall a sync for hours.
DEFAULT_MAX_RETRY_AFTER = 120.0

# How much of a server's error body is quoted in an error message.
_MESSAGE_LIMIT = 300
# The text sent to learn the dimension when it is needed before any real call.
_PROBE_TEXT = "dimension probe"


@dataclass(frozen=True)
class RetryNotice:
    """One retry about to happen: why, which attempt comes next, and how long we wait first."""

    reason: str  # "429", "503", "timeout", "connection"
    next_attempt: int  # 2 for the first retry
    delay: float  # seconds
    retry_after: float | None  # what the server asked for, if it did


class _Retryable(Exception):
    """A failed attempt that may succeed if repeated."""

    def __init__(self, reason: str, message: str, retry_after: float | None = None) -> None:
        super().__init__(message)
        self.reason = reason
        self.retry_after = retry_after


class _Cancelled(Exception):
    """Another batch of the same call failed for good; this one stops at its next wait."""


#: Options a spec may add after MODEL (and KEY_ENV) as NAME=VALUE: the spec's name, the
#: HttpEmbedder argument it sets, and its type.
SPEC_OPTIONS: dict[str, tuple[str, type]] = {
    "batch": ("batch_size", int),
    "batch_tokens": ("max_batch_tokens", int),
    "concurrency": ("concurrency", int),
    "timeout": ("timeout", float),
    "attempts": ("max_attempts", int),
    "input_tokens": ("max_input_tokens", int),
}
_SPEC_USAGE = (
    "use http:BASE_URL,MODEL[,KEY_ENV][,NAME=VALUE ...] with NAME one of "
    + ", ".join(SPEC_OPTIONS)
    + ", for example http:http://127.0.0.1:8080,minilm,EMBED_KEY,batch=32,concurrency=4"
)


def parse_spec(body: str) -> tuple[str, str, str | None, dict[str, Any]]:
    """Split the part of a spec after ``http:`` into (base_url, model, key_env or None,
    HttpEmbedder keyword options)."""
    parts = [part.strip() for part in body.split(",")]
    if len(parts) < 2 or not all(parts):
        raise EmbedderError(f"bad embedder spec 'http:{body}': {_SPEC_USAGE}")
    base_url, model, rest = parts[0], parts[1], parts[2:]
    key_env = None
    if rest and "=" not in rest[0]:
        key_env, rest = rest[0], rest[1:]
    options: dict[str, Any] = {}
    for part in rest:
        name, _, value = part.partition("=")
        if name not in SPEC_OPTIONS or not value:
            raise EmbedderError(f"bad embedder spec 'http:{body}': {part!r}: {_SPEC_USAGE}")
        argument, kind = SPEC_OPTIONS[name]
        try:
            number = kind(value)
        except ValueError:
            raise EmbedderError(
                f"bad embedder spec 'http:{body}': {name} must be a number, not {value!r}"
            ) from None
        if number <= 0:
            raise EmbedderError(f"bad embedder spec 'http:{body}': {name} must be above 0")
        options[argument] = number
    return base_url, model, key_env, options


def parse_retry_after(value: str | None, now: float | None = None) -> float | None:
    """Seconds to wait from a ``Retry-After`` value: delay-seconds or an HTTP-date.

    RFC 9110 section 10.2.3 [from memory] allows both forms; an unparseable value is ignored (None).
    """
    if value is None:
        return None
    value = value.strip()
    if value.isdigit():
        return float(value)
    try:
        when = email.utils.parsedate_to_datetime(value)
    except (TypeError, ValueError):
        return None
    if when is None:
        return None
    return max(0.0, when.timestamp() - (time.time() if now is None else now))


def _normalise_base_url(base_url: str) -> str:
    parsed = urllib.parse.urlsplit(base_url.strip())
    if parsed.scheme not in ("http", "https") or not parsed.netloc:
        raise EmbedderError(
            f"embedding server URL {base_url!r} must be an http:// or https:// URL with a host"
        )
    path = parsed.path.rstrip("/")
    # People copy the OpenAI base URL, which ends in /v1; the endpoint adds /v1 itself.
    if path.endswith("/v1"):
        path = path[: -len("/v1")]
    return urllib.parse.urlunsplit((parsed.scheme, parsed.netloc, path, "", ""))


def _server_message(body: bytes) -> str:
    """The server's own explanation: OpenAI's {"error": {"message"}} or the start of the body."""
    text = body.decode("utf-8", errors="replace").strip()
    try:
        parsed = json.loads(text)
    except ValueError:
        parsed = None
    if isinstance(parsed, dict):
        error = parsed.get("error")
        if isinstance(error, dict) and isinstance(error.get("message"), str):
            return error["message"][:_MESSAGE_LIMIT]
        if isinstance(error, str):
            return error[:_MESSAGE_LIMIT]
        if isinstance(parsed.get("detail"), str):
            return parsed["detail"][:_MESSAGE_LIMIT]
    return text[:_MESSAGE_LIMIT] or "(empty body)"


class HttpEmbedder:
    """Embeds through a remote OpenAI-compatible ``/v1/embeddings`` endpoint.

    Building one is cheap and makes no request. The dimension is learned from the first answer
    (or given as ``dimension``); reading :attr:`dimension` before any call sends one short probe
    text. ``embed`` may run up to ``concurrency`` requests at once; it is safe to call from
    several threads.
    """

    def __init__(
        self,
        base_url: str,
        model: str,
        *,
        api_key_env: str | None = None,
        batch_size: int = DEFAULT_BATCH_SIZE,
        max_batch_tokens: int = DEFAULT_MAX_BATCH_TOKENS,
        concurrency: int = DEFAULT_CONCURRENCY,
        max_input_tokens: int = DEFAULT_MAX_INPUT_TOKENS,
        timeout: float = DEFAULT_TIMEOUT,
        max_attempts: int = DEFAULT_MAX_ATTEMPTS,
        backoff_base: float = DEFAULT_BACKOFF_BASE,
        backoff_cap: float = DEFAULT_BACKOFF_CAP,
        max_retry_after: float = DEFAULT_MAX_RETRY_AFTER,
        dimension: int | None = None,
        tokenizer_path: str | Path | None = None,
        on_retry: Callable[[RetryNotice], None] | None = None,
    ) -> None:
        for name, value, least in (
            ("batch_size", batch_size, 1),
            ("max_batch_tokens", max_batch_tokens, 1),
            ("concurrency", concurrency, 1),
            ("max_input_tokens", max_input_tokens, 1),
            ("max_attempts", max_attempts, 1),
        ):
            if value < least:
                raise EmbedderError(f"HttpEmbedder {name} must be at least {least}, got {value}")
        if timeout <= 0 or backoff_base < 0 or backoff_cap < 0 or max_retry_after < 0:
            raise EmbedderError("HttpEmbedder timeout must be positive and waits not negative")
        if not model.strip():
            raise EmbedderError("HttpEmbedder needs a model name")
        self.base_url = _normalise_base_url(base_url)
        self.endpoint = self.base_url + "/v1/embeddings"
        self.model = model.strip()
        self.api_key_env = api_key_env
        self._api_key = os.environ.get(api_key_env) if api_key_env else None
        self.batch_size = batch_size
        self.max_batch_tokens = max_batch_tokens
        self.concurrency = concurrency
        self.max_input_tokens = max_input_tokens
        self.timeout = timeout
        self.max_attempts = max_attempts
        self.backoff_base = backoff_base
        self.backoff_cap = backoff_cap
        self.max_retry_after = max_retry_after
        self.on_retry = on_retry
        self.tokens = TokenCounter(tokenizer_path)
        self.model_id = f"{self.base_url}#{self.model}"
        self._dimension: int | None = dimension
        self._dimension_from = "configuration" if dimension is not None else ""
        self._dimension_lock = threading.Lock()
        # Jitter only spreads retries out; it needs no cryptographic quality.
        self._random = random.Random()

    # --- protocol ----------------------------------------------------------------------------

    @property
    def dimension(self) -> int:
        """The vector length: configured, learned from the first answer, or probed once now."""
        if self._dimension is None:
            self.embed([_PROBE_TEXT])
        assert self._dimension is not None
        return self._dimension

    @dimension.setter
    def dimension(self, expected: int) -> None:
        """Declare the dimension every answer must have (as the ``dimension`` argument does)."""
        with self._dimension_lock:
            self._dimension = expected
            self._dimension_from = "configuration"

    def embed(self, texts: Sequence[str]) -> np.ndarray:
        """float32 (len(texts), dimension), unit rows, in input order; EmbedderError if the
        server refuses, keeps failing past ``max_attempts``, or answers malformed rows."""
        texts = list(texts)
        if not texts:
            return np.zeros((0, self.dimension), dtype=np.float32)
        unique = list(dict.fromkeys(texts))
        batches = self._plan_batches(unique)
        vectors: dict[str, np.ndarray] = {}
        if len(batches) == 1 or self.concurrency == 1:
            stop = threading.Event()
            for batch in batches:
                vectors.update(zip(batch, self._embed_batch(batch, stop), strict=True))
        else:
            vectors = self._embed_concurrently(batches)
        return np.stack([vectors[text] for text in texts]).astype(np.float32, copy=False)

    def describe(self) -> dict[str, Any]:
        """What the index records: the endpoint, the remote model and budgets; never the key."""
        return {
            "model_id": self.model_id,
            "kind": "http",
            "base_url": self.base_url,
            "model": self.model,
            "key_env": self.api_key_env,
            "weights_sha256": None,
            # Chunk budgets are counted with this tokenizer: an estimate of the remote model's.
            "tokenizer_sha256": file_sha256(self.tokens.path),
            "dimension": self.dimension,
            "max_input_tokens": self.max_input_tokens,
        }

    # --- batching ----------------------------------------------------------------------------

    def _plan_batches(self, texts: list[str]) -> list[list[str]]:
        """Consecutive runs of texts, each within batch_size texts and max_batch_tokens tokens
        (a text over the token budget on its own goes alone)."""
        counts = self.tokens.count(texts)
        batches: list[list[str]] = []
        current: list[str] = []
        current_tokens = 0
        for text, count in zip(texts, counts, strict=True):
            full = len(current) >= self.batch_size
            if current and (full or current_tokens + count > self.max_batch_tokens):
                batches.append(current)
                current, current_tokens = [], 0
            current.append(text)
            current_tokens += count
        if current:
            batches.append(current)
        return batches

    def _embed_concurrently(self, batches: list[list[str]]) -> dict[str, np.ndarray]:
        stop = threading.Event()
        vectors: dict[str, np.ndarray] = {}
        with ThreadPoolExecutor(
            max_workers=min(self.concurrency, len(batches)), thread_name_prefix="upwell-embed"
        ) as pool:
            futures: dict[Future[np.ndarray], list[str]] = {
                pool.submit(self._embed_batch, batch, stop): batch for batch in batches
            }
            done, pending = wait(futures, return_when=FIRST_EXCEPTION)
            failed = [future for future in done if future.exception() is not None]
            if failed:
                # Stop the rest at their next wait and drop the ones not started; leaving the
                # with-block then joins the workers, so no request outlives this call.
                stop.set()
                for future in pending:
                    future.cancel()
                wait(pending)
                errors = [f.exception() for f in futures if f.done() and not f.cancelled()]
                real = [e for e in errors if e is not None and not isinstance(e, _Cancelled)]
                raise (real or errors)[0]  # type: ignore[misc]
            for future, batch in futures.items():
                vectors.update(zip(batch, future.result(), strict=True))
        return vectors

    # --- one batch, with retries -------------------------------------------------------------

    def _embed_batch(self, batch: list[str], stop: threading.Event) -> np.ndarray:
        """Unit vectors of one batch, in batch order, retrying transient failures."""
        payload = json.dumps({"model": self.model, "input": batch}).encode("utf-8")
        last: _Retryable | None = None
        for attempt in range(1, self.max_attempts + 1):
            if stop.is_set():
                raise _Cancelled()
            try:
                return self._parse_answer(self._post(payload), len(batch))
            except _Retryable as exc:
                last = exc
            if attempt == self.max_attempts:
                break
            delay = self._backoff(attempt, last.retry_after)
            notice = RetryNotice(last.reason, attempt + 1, delay, last.retry_after)
            log.warning(
                "embedding server %s: %s; retry %d of %d in %.2f s",
                self.endpoint,
                last,
                attempt,
                self.max_attempts - 1,
                delay,
            )
            if self.on_retry is not None:
                self.on_retry(notice)
            if stop.wait(delay):
                raise _Cancelled()
        assert last is not None
        raise EmbedderError(
            f"the embedding server at {self.endpoint} still failed after {self.max_attempts} "
            f"attempts: {last}"
        )

    def _backoff(self, attempt: int, retry_after: float | None) -> float:
        """Full jitter: uniform in [0, min(cap, base * 2**(attempt-1))], as in the AWS
        Architecture Blog's "Exponential Backoff And Jitter" (from memory); never shorter than
        what the server asked for, which is capped at max_retry_after."""
        ceiling = min(self.backoff_cap, self.backoff_base * 2 ** (attempt - 1))
        jittered = self._random.uniform(0.0, ceiling)
        if retry_after is None:
            return jittered
        # A little jitter on top keeps concurrent batches told the same time from returning
        # together.
        return min(retry_after, self.max_retry_after) + self._random.uniform(
            0.0, min(self.backoff_base, ceiling)
        )

    def _post(self, payload: bytes) -> bytes:
        """One POST; the answer body on 200, _Retryable for transient failures, EmbedderError
        for a refusal."""
        headers = {"Content-Type": "application/json", "Accept": "application/json"}
        if self._api_key:
            headers["Authorization"] = f"Bearer {self._api_key}"
        request = urllib.request.Request(self.endpoint, data=payload, headers=headers)
        try:
            with urllib.request.urlopen(request, timeout=self.timeout) as response:
                return bytes(response.read())
        except urllib.error.HTTPError as exc:
            try:
                body = exc.read()
            except (OSError, http.client.HTTPException):
                body = b""
            finally:
                exc.close()
            raise self._status_error(exc.code, exc.reason, exc.headers, body) from None
        except TimeoutError:
            raise _Retryable("timeout", f"no answer within {self.timeout:g} s") from None
        except urllib.error.URLError as exc:
            if isinstance(exc.reason, TimeoutError | socket.timeout):
                raise _Retryable("timeout", f"no answer within {self.timeout:g} s") from None
            if isinstance(exc.reason, ssl.SSLCertVerificationError):
                # Repeating will not make the certificate valid.
                raise EmbedderError(f"cannot reach {self.endpoint}: {exc.reason}") from None
            if isinstance(exc.reason, OSError):
                raise _Retryable("connection", f"cannot connect: {exc.reason}") from None
            raise EmbedderError(f"cannot reach {self.endpoint}: {exc.reason}") from None
        except (http.client.HTTPException, ConnectionError) as exc:
            raise _Retryable("connection", f"connection dropped: {exc!r}") from None

    def _status_error(
        self, status: int, reason: str, headers: Any, body: bytes
    ) -> _Retryable | EmbedderError:
        message = _server_message(body)
        if status == 429 or status == 408 or status >= 500:
            retry_after = parse_retry_after(headers.get("Retry-After") if headers else None)
            return _Retryable(str(status), f"HTTP {status} {reason}: {message}", retry_after)
        hint = ""
        if status in (401, 403):
            if self.api_key_env and not self._api_key:
                hint = f"; the key variable ${self.api_key_env} is not set"
            elif self.api_key_env:
                hint = f"; check the key in ${self.api_key_env}"
            else:
                hint = "; give the key's environment variable as http:BASE_URL,MODEL,KEY_ENV"
        elif status == 404:
            hint = "; is BASE_URL right (the endpoint is BASE_URL/v1/embeddings)?"
        elif status == 413:
            hint = "; lower batch_size or max_batch_tokens"
        return EmbedderError(
            f"the embedding server at {self.endpoint} refused the request: HTTP {status} "
            f"{reason}: {message}{hint}"
        )

    def _parse_answer(self, body: bytes, expected_rows: int) -> np.ndarray:
        """Rows of an OpenAI-style answer placed by their ``index``, checked and normalised."""
        try:
            answer = json.loads(body)
            rows = answer["data"]
            if not isinstance(rows, list):
                raise TypeError("'data' is not a list")
        except (ValueError, KeyError, TypeError) as exc:
            raise EmbedderError(
                f"the embedding server at {self.endpoint} sent an answer that is not an "
                f"embeddings list ({exc}): {_server_message(body)}"
            ) from None
        if len(rows) != expected_rows:
            raise EmbedderError(
                f"the embedding server at {self.endpoint} sent {len(rows)} vectors for "
                f"{expected_rows} texts"
            )
        placed: list[list[float] | None] = [None] * expected_rows
        for position, row in enumerate(rows):
            index = row.get("index", position) if isinstance(row, dict) else None
            vector = row.get("embedding") if isinstance(row, dict) else None
            if not isinstance(index, int) or not 0 <= index < expected_rows or placed[index]:
                raise EmbedderError(
                    f"the embedding server at {self.endpoint} sent a row with a missing, "
                    f"repeated or out-of-range index {index!r}"
                )
            if not isinstance(vector, list) or not vector:
                raise EmbedderError(
                    f"the embedding server at {self.endpoint} sent row {index} without a list of "
                    "floats (only encoding_format 'float' is supported)"
                )
            placed[index] = vector
        try:
            matrix = np.array(placed, dtype=np.float64)
        except ValueError:
            lengths = sorted({len(vector) for vector in placed if vector is not None})
            raise EmbedderError(
                f"the embedding server at {self.endpoint} sent vectors of different lengths "
                f"{lengths} in one answer"
            ) from None
        if matrix.ndim != 2:
            raise EmbedderError(f"the embedding server at {self.endpoint} sent nested vectors")
        self._check_dimension(matrix.shape[1])
        norms = np.linalg.norm(matrix, axis=1, keepdims=True)
        if not np.all(np.isfinite(matrix)) or not np.all(norms > 0):
            raise EmbedderError(
                f"the embedding server at {self.endpoint} sent a zero or non-finite vector"
            )
        return np.ascontiguousarray(matrix / norms, dtype=np.float32)

    def _check_dimension(self, got: int) -> None:
        with self._dimension_lock:
            if self._dimension is None:
                self._dimension = got
                self._dimension_from = "the server's first answer"
                return
        if got != self._dimension:
            raise EmbedderError(
                f"the embedding server at {self.endpoint} sent {got}-dimensional vectors, but "
                f"{self._dimension} was set by {self._dimension_from}; the model behind "
                f"{self.model_id} changed: rebuild the index with the new model"
            )


def from_spec(body: str) -> HttpEmbedder:
    """The embedder for the part of a spec after ``http:``; makes no request."""
    base_url, model, key_env, options = parse_spec(body)
    return HttpEmbedder(base_url, model, api_key_env=key_env, **options)
