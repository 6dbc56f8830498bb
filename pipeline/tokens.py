"""Token counting with the embedding model's own tokenizer.

The chunker budgets chunks in the model's tokens, because a longer input would be silently
truncated by the model. Counts here exclude the special tokens ([CLS], [SEP]) that the embedder
adds; the embedder's ``max_input_tokens`` already has them subtracted.
"""

from __future__ import annotations

from collections.abc import Sequence
from functools import lru_cache
from pathlib import Path

from tokenizers import Tokenizer

DEFAULT_TOKENIZER = Path(__file__).with_name("model") / "tokenizer.json"


@lru_cache(maxsize=4)
def _load(path: str) -> Tokenizer:
    tok = Tokenizer.from_file(path)
    # Counting must see the whole text: no truncation, no padding.
    tok.no_truncation()
    tok.no_padding()
    return tok


class TokenCounter:
    """Counts and locates tokens of a WordPiece/BPE tokenizer.json, without special tokens."""

    def __init__(self, tokenizer_path: str | Path | None = None) -> None:
        self.path = str(tokenizer_path or DEFAULT_TOKENIZER)
        self._tok = _load(self.path)

    def count(self, texts: Sequence[str]) -> list[int]:
        """Number of tokens in each text, special tokens excluded."""
        if not texts:
            return []
        encs = self._tok.encode_batch(list(texts), add_special_tokens=False)
        return [len(e.ids) for e in encs]

    def count_one(self, text: str) -> int:
        return len(self._tok.encode(text, add_special_tokens=False).ids)

    def offsets(self, text: str) -> list[tuple[int, int]]:
        """Character span (start, end) in ``text`` of every token, special tokens excluded."""
        return list(self._tok.encode(text, add_special_tokens=False).offsets)
