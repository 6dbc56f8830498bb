"""Token counting with the embedding model's own tokenizer.

The chunker budgets chunks in the model's tokens, because a longer input would be silently
truncated by the model. Counts here exclude the special tokens ([CLS], [SEP]) that the embedder
adds; the embedder's ``max_input_tokens`` already has them subtracted.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from functools import lru_cache
from pathlib import Path

from tokenizers import Tokenizer

DEFAULT_TOKENIZER = Path(__file__).with_name("model") / "tokenizer.json"


# Pre-tokenizers that split at every whitespace character before the model sees a word, and
# normalizers that map one character at a time (tokenizers' documentation of each; from memory):
# with both, text joined at whitespace has exactly the tokens of its parts.
_SPLITS_AT_WHITESPACE = frozenset({"BertPreTokenizer", "Whitespace", "WhitespaceSplit"})
_PER_CHARACTER_NORMALIZERS = frozenset(
    {"BertNormalizer", "Lowercase", "NFC", "NFD", "NFKC", "NFKD", "StripAccents"}
)


@lru_cache(maxsize=4)
def _splits_at_whitespace(path: str) -> bool:
    """Whether the tokenizer in ``path`` tokenizes each whitespace-separated word on its own."""
    try:
        config = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    pre = config.get("pre_tokenizer") or {}
    normalizer = config.get("normalizer") or {}
    if normalizer.get("type") == "Sequence":
        steps = normalizer.get("normalizers", [])
    else:
        steps = [normalizer] if normalizer else []
    return pre.get("type") in _SPLITS_AT_WHITESPACE and all(
        step.get("type") in _PER_CHARACTER_NORMALIZERS for step in steps
    )


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
        #: True when texts joined with whitespace count exactly the sum of their counts (the
        #: bundled model's WordPiece tokenizer, for one), so a joined text need not be counted
        #: again. False for tokenizers that may merge across a space, or that cannot be told.
        self.additive = _splits_at_whitespace(self.path)

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
