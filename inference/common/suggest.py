"""Close-match suggestions for misspelt names ("did you mean ...?"), one helper for every registry and option.

Similarity is :class:`difflib.SequenceMatcher`'s ratio (twice the matched characters over the total length), as
``difflib.get_close_matches`` computes it; a candidate counts as close from a ratio of 0.5 (common practice for
typo hints, no source: "gausian" -> "gaussian" scores 0.93, "bm4d" -> "bm3d" 0.75).
"""
from __future__ import annotations

import difflib
from collections.abc import Iterable

CLOSE_RATIO = 0.5


def close_matches(word: str, choices: Iterable[str], *, most: int = 1, cutoff: float = CLOSE_RATIO) -> list[str]:
    """The (at most ``most``) choices closest to ``word``, best first; those below ``cutoff`` are left out."""
    return difflib.get_close_matches(word, list(choices), n=most, cutoff=cutoff)


def did_you_mean(word: str, choices: Iterable[str], *, most: int = 1, cutoff: float = CLOSE_RATIO,
                 prefix: str = "", listed: bool = False) -> str:
    """The hint to append to an error about an unknown ``word``, or "" when no choice is close.

    ``" (did you mean 'PREFIXbest'?)"`` by default; with ``listed``, the ``most`` closest as a clause:
    ``"; did you mean a, b?"``.
    """
    close = close_matches(word, choices, most=most, cutoff=cutoff)
    if not close:
        return ""
    if listed:
        return f"; did you mean {', '.join(close)}?"
    return f" (did you mean '{prefix}{close[0]}'?)"
