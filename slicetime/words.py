"""Counting words for messages (model layer, no I/O): one helper for plurals and
articles, so "1 entry that is" and "2 entries that are" never go wrong."""

from __future__ import annotations

#: nouns whose plural is not the noun plus "s"
_IRREGULAR = {
    "entry": "entries", "index": "indices", "axis": "axes", "series": "series",
    "child": "children", "was": "were", "is": "are", "has": "have", "does": "do",
    "this": "these", "that": "those", "it": "they", "matches": "match",
    "differs": "differ", "disagrees": "disagree", "remains": "remain",
}


def plural_of(word: str) -> str:
    """The plural of a noun (or the plural form of a verb in the third person)."""
    if word in _IRREGULAR:
        return _IRREGULAR[word]
    if word.endswith(("s", "x", "sh", "ch")):
        return word + "es"
    if word.endswith("y") and word[-2:-1] not in ("a", "e", "i", "o", "u"):
        return word[:-1] + "ies"
    return word + "s"


def agree(n: int, word: str) -> str:
    """``word`` as it agrees with a count of ``n`` (singular only for exactly 1)."""
    return word if n == 1 else plural_of(word)


def count(n: int, noun: str) -> str:
    """``1 entry``, ``2 entries``, ``0 runs``."""
    return f"{n} {agree(n, noun)}"


def article(word: str) -> str:
    """``a`` or ``an`` before ``word`` (by its first letter; enough for our nouns)."""
    return "an" if word[:1].lower() in "aeiou" else "a"


def with_article(word: str) -> str:
    return f"{article(word)} {word}"




def encoding_direction(axis: str, direction: str) -> str:
    """The slice axis as the standard's SliceEncodingDirection spells it: ``k`` or ``k-``
    (BIDS: one of i, j, k, i-, j-, k-), the one spelling every screen and report uses."""
    return axis if direction == "+" else f"{axis}-"


__all__ = ["agree", "article", "count", "encoding_direction", "plural_of", "with_article"]
