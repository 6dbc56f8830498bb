"""Units a person writes in a configuration file: durations such as "90s" or "1h30m"."""

from __future__ import annotations

import re

_DURATION = re.compile(r"^(?:(\d+)h)?(?:(\d+)m)?(?:(\d+(?:\.\d+)?)s)?$")


def parse_duration(text: str) -> float:
    """Seconds in ``"90s"``, ``"15m"``, ``"1h"`` or ``"1h30m"``; ValueError otherwise."""
    match = _DURATION.match(text.strip())
    if not text.strip() or not match or not any(match.groups()):
        raise ValueError(f'{text!r} is not a duration such as "30s", "15m", "1h" or "1h30m"')
    hours, minutes, seconds = match.groups()
    total = int(hours or 0) * 3600 + int(minutes or 0) * 60 + float(seconds or 0)
    if total <= 0:
        raise ValueError(f"{text!r} is not a positive duration")
    return total
