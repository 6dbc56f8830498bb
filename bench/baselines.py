"""The two naive chunkers figure 1 compares upwell with, and how each decides what to re-embed.

- Fixed windows: ``window`` tokens, each starting ``window - overlap`` tokens after the previous
  one, keyed by position (document, window number); a window is re-embedded when the text at
  its position changed. This is the common approach (common practice: fixed token windows with
  overlap, stored under a positional id).
- Whole document: the document's hash decides; any change re-embeds every window of it.

Both count tokens with the same tokenizer as upwell, so the three are measured in one unit.
"""

from __future__ import annotations

from pipeline.tokens import TokenCounter

# Same budget as upwell's defaults (ChunkSettings.max_tokens=200, overlap_tokens=40), so the
# comparison is between boundary rules, not between chunk sizes.
WINDOW_TOKENS = 200
OVERLAP_TOKENS = 40


def fixed_windows(
    text: str,
    counter: TokenCounter,
    window: int = WINDOW_TOKENS,
    overlap: int = OVERLAP_TOKENS,
) -> list[str]:
    """The text of each window, in order; windows cover every token, the last may be short."""
    if not 0 <= overlap < window:
        raise ValueError(f"need 0 <= overlap < window, got {overlap} and {window}")
    offsets = counter.offsets(text)
    stride = window - overlap
    windows: list[str] = []
    for first in range(0, len(offsets), stride):
        last = min(first + window, len(offsets)) - 1
        windows.append(text[offsets[first][0] : offsets[last][1]])
        if last == len(offsets) - 1:
            break
    return windows


def fixed_window_reembedded(before: list[str], after: list[str]) -> int:
    """Windows to re-embed when position keys the vectors: every position whose text changed."""
    return sum(
        1
        for position, text in enumerate(after)
        if position >= len(before) or before[position] != text
    )


def whole_document_reembedded(before_text: str, after_text: str, after_windows: int) -> int:
    """Any change to the document's bytes re-embeds all of it; no change re-embeds nothing."""
    return after_windows if before_text != after_text else 0
