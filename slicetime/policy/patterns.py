"""Patterns of the lab policy: finding codes with ``*`` and ``?`` (``header/*``), and
run paths relative to the dataset root (``sub-pilot*/**``). Pure: no I/O."""

from __future__ import annotations

import fnmatch
import functools
import re

__all__ = ["CODE_CHARS", "code_matches", "is_pattern", "path_matches", "path_pattern_problem"]


def is_pattern(code: str) -> bool:
    return "*" in code or "?" in code


#: the characters of a finding code or code pattern
CODE_CHARS = re.compile(r"[a-z0-9/*?-]+\Z")


def code_matches(pattern: str, code: str) -> bool:
    """Whether a finding code matches a code or a ``*``/``?`` pattern."""
    if not is_pattern(pattern):
        return pattern == code
    return fnmatch.fnmatchcase(code, pattern)


def path_pattern_problem(pattern: str) -> str | None:
    """Why ``pattern`` is not a valid run path pattern, or None."""
    if not pattern:
        return "must not be empty"
    if "\\" in pattern:
        return "use forward slashes (/) between folders"
    if pattern.startswith("/"):
        return "must be relative to the dataset root (no leading /)"
    body = pattern[:-1] if pattern.endswith("/") else pattern
    for segment in body.split("/"):
        if segment == "":
            return "has an empty folder name (//)"
        if segment in (".", ".."):
            return "must not contain . or .. folders"
        if "**" in segment and segment != "**":
            return "** must stand alone between slashes (write sub-*/** rather than sub-**)"
        problem = _segment_problem(segment)
        if problem:
            return problem
    return None


def _segment_problem(segment: str) -> str | None:
    i = 0
    while i < len(segment):
        if segment[i] == "[":
            end = _class_end(segment, i)
            if end is None:
                return "has a [ without its closing ]"
            i = end
        i += 1
    return None


def _class_end(segment: str, start: int) -> int | None:
    """Index of the ``]`` closing the set opened at ``start`` (a leading ``]`` is literal)."""
    j = start + 1
    if j < len(segment) and segment[j] == "!":
        j += 1
    if j < len(segment) and segment[j] == "]":
        j += 1
    close = segment.find("]", j)
    return close if close != -1 else None


def _segment_regex(segment: str) -> str:
    out: list[str] = []
    i = 0
    while i < len(segment):
        char = segment[i]
        if char == "*":
            out.append("[^/]*")
        elif char == "?":
            out.append("[^/]")
        elif char == "[":
            end = _class_end(segment, i)
            assert end is not None  # validated before
            body = segment[i + 1 : end]
            negate = body.startswith("!")
            if negate:
                body = body[1:]
            escaped = "".join("\\" + c if c in "\\^[]" else c for c in body)
            out.append(f"[^/{escaped}]" if negate else f"[{escaped}]")
            i = end
        else:
            out.append(re.escape(char))
        i += 1
    return "".join(out)


@functools.lru_cache(maxsize=1024)
def _path_regex(pattern: str) -> re.Pattern[str]:
    body = pattern[:-1] if pattern.endswith("/") else pattern
    segments = body.split("/")
    out: list[str] = []
    for i, segment in enumerate(segments):
        last = i == len(segments) - 1
        if segment == "**":
            out.append(".*" if last else "(?:[^/]+/)*")
        else:
            out.append(_segment_regex(segment) + ("" if last else "/"))
    # a pattern that selects a folder covers everything below it
    return re.compile("(?:" + "".join(out) + ")(?:/.*)?", re.DOTALL)


def path_matches(pattern: str, path: str) -> bool:
    """Whether a dataset-relative posix ``path`` matches a run path pattern.

    Raises ValueError for an invalid pattern (:func:`path_pattern_problem`).
    """
    problem = path_pattern_problem(pattern)
    if problem:
        raise ValueError(f"path pattern {pattern!r} {problem}")
    return _path_regex(pattern).fullmatch(path) is not None

