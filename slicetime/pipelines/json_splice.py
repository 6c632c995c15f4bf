"""Edit the top-level members of a JSON object by splicing text: no other byte changes.

A sidecar is rewritten by replacing only the text of the value that changes
(or inserting / removing one member); every other byte — number spellings
such as ``2.000``, ``\\u00e9`` escapes, inline or expanded arrays, key order,
indentation, line endings, the final newline, and values a strict parser
refuses such as ``NaN`` or ``1e400`` — stays as it was. Pure text functions,
no I/O.

What is written new, and how:

* a replaced value takes the layout of the value it replaces: inline when the
  old text was on one line (with its item separator, ``", "`` or ``","``),
  else one item per line at the old value's indentation;
* a new member is appended after the last one, with the whitespace that
  separates the existing members and their key-value separator; in an empty
  object it goes on its own line, indented by two spaces;
* a removed member takes its comma and the whitespace before the next key
  (or, for the last member, the comma and whitespace after the previous value);
* numbers are spelled as Python's shortest round-trip form (``0.0525``), and
  non-ASCII text is escaped when the file escapes it elsewhere.
"""

from __future__ import annotations

import json
import re
from collections.abc import Sequence
from dataclasses import dataclass
from json.decoder import scanstring  # type: ignore[attr-defined]  # not in the stubs
from typing import Any

_WS = re.compile(r"[ \t\n\r]*")
_DECODER = json.JSONDecoder()


class Delete:
    """The new value of a member that is removed."""

    def __repr__(self) -> str:
        return "DELETE"


DELETE: Any = Delete()


@dataclass(frozen=True)
class Member:
    key: str
    key_start: int  # the opening quote of the key
    key_end: int  # just after the closing quote
    value_start: int
    value_end: int


@dataclass(frozen=True)
class Layout:
    """Where the members of a top-level object sit in its text."""

    open: int  # index of "{"
    close: int  # index of "}"
    members: tuple[Member, ...]

    def find(self, key: str) -> Member | None:
        for member in self.members:
            if member.key == key:
                return member
        return None


def _skip(text: str, i: int) -> int:
    match = _WS.match(text, i)
    return match.end() if match else i


def scan(text: str) -> Layout:
    """The members of the object ``text`` holds; ``ValueError`` (one line) otherwise. A
    leading UTF-8 byte-order mark is skipped (RFC 8259 lets a parser ignore it) and, being
    outside every member, kept by an edit."""
    i = _skip(text, 1 if text.startswith("\ufeff") else 0)
    if text[i : i + 1] != "{":
        raise ValueError("its top level is not a JSON object")
    start = i
    i = _skip(text, i + 1)
    members: list[Member] = []
    if text[i : i + 1] == "}":
        close = i
    else:
        while True:
            if text[i : i + 1] != '"':
                raise ValueError(f"a key was expected at character {i}")
            try:
                key, key_end = scanstring(text, i + 1, True)
            except ValueError as exc:
                raise ValueError(f"a key cannot be read ({exc})") from None
            j = _skip(text, key_end)
            if text[j : j + 1] != ":":
                raise ValueError(f"':' was expected at character {j}")
            value_start = _skip(text, j + 1)
            try:
                _, value_end = _DECODER.raw_decode(text, value_start)
            except ValueError as exc:
                raise ValueError(f"the value of {key!r} cannot be read ({exc})") from None
            members.append(Member(key, i, key_end, value_start, value_end))
            k = _skip(text, value_end)
            mark = text[k : k + 1]
            if mark == ",":
                i = _skip(text, k + 1)
                continue
            if mark == "}":
                close = k
                break
            raise ValueError(f"',' or '}}' was expected at character {k}")
    if _skip(text, close + 1) != len(text):
        raise ValueError("there is text after the top-level object")
    keys = [m.key for m in members]
    repeated = sorted({k for k in keys if keys.count(k) > 1}) if len(set(keys)) < len(keys) else []
    if repeated:
        raise ValueError(f"it repeats the key {repeated[0]!r}; a rewrite would have to drop "
                         "one of the values, so fix that by hand first")
    return Layout(start, close, tuple(members))


def escapes_non_ascii(text: str) -> bool:
    """Whether the file writes non-ASCII text as ``\\u`` escapes (and holds none raw)."""
    return "\\u" in text and text.isascii()


def _line_indent(text: str, i: int) -> str:
    """The whitespace that starts the line holding position ``i``."""
    line_start = text.rfind("\n", 0, i) + 1
    match = re.match(r"[ \t]*", text[line_start:])
    return match.group(0) if match else ""


def _unit(text: str, layout: Layout) -> str:
    """One level of indentation in the file (two spaces when it shows none)."""
    if layout.members:
        gap = text[layout.open + 1 : layout.members[0].key_start]
        if "\n" in gap:
            unit = gap.rsplit("\n", 1)[1]
            if unit:
                return unit
    return "  "


def _dumps(value: Any, ascii_only: bool, item_sep: str, indent: str | None) -> str:
    return json.dumps(value, ensure_ascii=ascii_only, allow_nan=False, indent=indent,
                      separators=(item_sep if indent is None else ",", ": "))


def render_like(old: str | None, value: Any, *, base: str, unit: str, ascii_only: bool,
                expanded: bool, item_sep: str = ", ") -> str:
    """``value`` as JSON text laid out like ``old`` (the text it replaces, if any).

    ``base`` is the indentation of the line the value starts on, ``unit`` one
    indentation level, ``expanded`` whether a new container is written one item
    per line (the file's habit) when there is no old text to follow.
    """
    if not isinstance(value, list | dict) or not value:
        return _dumps(value, ascii_only, ", ", None)
    if old is not None:
        if "\n" not in old:
            compact = re.search(r",\S", old) is not None and ", " not in old
            return _dumps(value, ascii_only, "," if compact else ", ", None)
        lines = old.split("\n")
        inner = re.match(r"[ \t]*", lines[1]).group(0) if len(lines) > 1 else ""  # type: ignore[union-attr]  # always matches
        closing = re.match(r"[ \t]*", lines[-1]).group(0)  # type: ignore[union-attr]  # always matches
        if inner.startswith(closing) and len(inner) > len(closing):
            unit = inner[len(closing) :]
        base = closing
    elif not expanded:
        return _dumps(value, ascii_only, item_sep, None)
    text = _dumps(value, ascii_only, ", ", unit)
    return text.replace("\n", "\n" + base)


def splice(text: str, edits: Sequence[tuple[str, Any]]) -> str:
    """``text`` with each ``(key, value)`` set (or removed, for :data:`DELETE`)."""
    ascii_only = escapes_non_ascii(text)
    for key, value in edits:
        layout = scan(text)
        member = layout.find(key)
        if value is DELETE:
            if member is not None:
                text = _remove(text, layout, member)
            continue
        if member is not None:
            old = text[member.value_start : member.value_end]
            new = render_like(old, value, base=_line_indent(text, member.value_start),
                              unit=_unit(text, layout), ascii_only=ascii_only, expanded=True)
            current = json.loads(old)
            if current != value or type(current) is not type(value):
                text = text[: member.value_start] + new + text[member.value_end :]
            continue
        text = _append(text, layout, key, value, ascii_only)
    return text


def _remove(text: str, layout: Layout, member: Member) -> str:
    index = layout.members.index(member)
    if len(layout.members) == 1:
        return text[: layout.open + 1] + text[layout.close :]
    if index + 1 < len(layout.members):
        return text[: member.key_start] + text[layout.members[index + 1].key_start :]
    previous = layout.members[index - 1]
    return text[: previous.value_end] + text[member.value_end :]


def _append(text: str, layout: Layout, key: str, value: Any, ascii_only: bool) -> str:
    rendered_key = json.dumps(key, ensure_ascii=ascii_only)
    if not layout.members:
        unit = "  "
        body = render_like(None, value, base=unit, unit=unit, ascii_only=ascii_only,
                           expanded=True)
        return (text[: layout.open + 1] + "\n" + unit + rendered_key + ": " + body + "\n"
                + text[layout.close :])
    last = layout.members[-1]
    if len(layout.members) >= 2:
        before_last = layout.members[-2]
        comma = text.index(",", before_last.value_end)
        gap = text[comma + 1 : last.key_start]
    else:
        gap = text[layout.open + 1 : last.key_start]
    colon = text[last.key_end : last.value_start]
    expanded = "\n" in gap
    base = gap.rsplit("\n", 1)[1] if expanded else ""
    body = render_like(None, value, base=base, unit=_unit(text, layout), ascii_only=ascii_only,
                       expanded=expanded, item_sep="," if not gap and colon == ":" else ", ")
    return (text[: last.value_end] + "," + gap + rendered_key + colon + body
            + text[last.value_end :])


__all__ = ["DELETE", "Layout", "Member", "escapes_non_ascii", "render_like", "scan", "splice"]
