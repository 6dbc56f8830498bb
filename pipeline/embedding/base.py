"""What every embedder is: the protocol, unit-length rows, and the file hashes it records."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any, Protocol, runtime_checkable

import numpy as np

from pipeline.errors import EmbedderError
from pipeline.hashing import sha256_file_once
from pipeline.tokens import TokenCounter

#: all-MiniLM-L6-v2 was trained with 256-token inputs (its sentence-transformers
#: max_seq_length); the tokenizer.json it ships says 128, which truncates long chunks.
DEFAULT_MAX_SEQ_LEN = 256


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


def normalise_rows(vectors: np.ndarray) -> np.ndarray:
    """Scale every row to unit L2 norm; a zero row (never expected) is left zero."""
    norms = np.linalg.norm(vectors, axis=1, keepdims=True)
    np.maximum(norms, 1e-12, out=norms)
    return np.ascontiguousarray(vectors / norms, dtype=np.float32)


def file_sha256(path: str | Path) -> str:
    """The sha256 an index records for a model or tokenizer file (hashed once per process)."""
    try:
        return sha256_file_once(path)
    except OSError as exc:
        raise EmbedderError(f"cannot read {path}: {exc.strerror or exc}") from exc
