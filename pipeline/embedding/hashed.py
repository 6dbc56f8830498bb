"""HashEmbedder: deterministic signed feature hashing of the MiniLM token ids, for fast tests of
the pipeline's logic. It has no notion of meaning beyond shared tokens."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
from tokenizers import Tokenizer

from pipeline.embedding.base import DEFAULT_MAX_SEQ_LEN, file_sha256, normalise_rows
from pipeline.errors import EmbedderError
from pipeline.tokens import TokenCounter

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
        return normalise_rows(out)

    def describe(self) -> dict[str, Any]:
        """Model id, dimension, token budget and the feature scheme; there are no weights."""
        return {
            "model_id": self.model_id,
            "kind": "hash",
            "weights_sha256": None,
            "tokenizer_sha256": file_sha256(Path(self.tokens.path)),
            "dimension": self.dimension,
            "max_seq_len": self.max_input_tokens + 2,
            "pooling": "signed feature hashing of token unigrams and bigrams",
        }
