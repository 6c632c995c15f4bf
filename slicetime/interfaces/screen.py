"""Fitting text to the terminal: the width to use, paths shortened in the middle,
words wrapped with their indentation kept, and how a finding is laid out.

Width (documented in the README, "Screens"): the ``COLUMNS`` environment
variable when it holds a whole number (at least 40), whether or not the output
is a terminal; else the terminal's width when the output is a terminal; else
no limit: piped or redirected output keeps every finding on one line, so
``grep`` finds its code, message and severity together.

ASCII (README, "Screens"): a screen uses only ASCII characters when its stream's
encoding is not UTF-8 or ``SLICETIME_ASCII`` is set (:func:`unicode_wanted`, the one
decision); :func:`screen_stream` then turns "×" into "x", "→" into "->", box
lines into ``-``/``|``/``+`` and so on (:func:`ascii_text`). Machine formats (JSON,
JUnit) are never changed: a scheme label keeps its standard words there.

Every function here is pure (strings in, strings out) except :func:`width_for`,
:func:`unicode_wanted`, :func:`screen_stream` and :func:`say` (which prints).
"""

from __future__ import annotations

import os
import re
import shutil
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from slicetime.model import ResolvedTiming

#: what a screen adds to a TR that only the image header gives (no applicable sidecar
#: has a usable RepetitionTime or VolumeTiming: ``ResolvedTiming.repetition_origin``)
HEADER_ONLY = "header only"
#: what a screen shows for a sidecar TR that no unit makes plausible
#: (``ResolvedTiming.repetition_unusable``): no divided number
TR_NOT_USABLE = "not usable"

#: the narrowest width honoured; below it lines are cut at 40 columns
MIN_WIDTH = 40
#: the severity words, padded to one column so codes line up
SEVERITY_WORD = {"error": "error", "warning": "warning", "note": "note"}
SEVERITY_PAD = max(len(w) for w in SEVERITY_WORD.values())
#: indentation of a finding's continuation lines (message, place, hint)
FINDING_INDENT = 4

Segment = tuple[str, str | None]  # text, style name (None: plain)
Line = list[Segment]


def width_for(stream: Any) -> int | None:
    """The width to fit ``stream``'s lines to, or None for no limit (see the module)."""
    text = os.environ.get("COLUMNS", "").strip()
    if text.isdigit() and int(text) > 0:
        return max(int(text), MIN_WIDTH)
    if bool(getattr(stream, "isatty", lambda: False)()):
        return max(shutil.get_terminal_size((100, 24)).columns, MIN_WIDTH)
    return None


def unicode_wanted(stream: Any) -> bool:
    """Whether a screen written to ``stream`` may use characters beyond ASCII: the
    stream's encoding is UTF-8 and ``SLICETIME_ASCII`` is not set. Every screen asks
    this (and only this)."""
    encoding = (getattr(stream, "encoding", None) or "").lower().replace("-", "")
    return "utf" in encoding and os.environ.get("SLICETIME_ASCII") is None


#: what a screen in ASCII mode prints for a character beyond ASCII
_ASCII = str.maketrans({
    "×": "x", "→": "->", "←": "<-", "…": "...", "≥": ">=", "≤": "<=", "≈": "~", "±": "+/-",
    "µ": "u", "–": "-", "—": "-", "›": ">", "‹": "<", "·": ".", "‘": "'", "’": "'",
    "“": '"', "”": '"', "│": "|", "┃": "|", "─": "-", "━": "-", "┼": "+", "╇": "+",
    "╋": "+", "┌": "+", "┐": "+", "└": "+", "┘": "+", "├": "+", "┤": "+", "┬": "+",
    "┴": "+", "┏": "+", "┓": "+", "┗": "+", "┛": "+", "┡": "+", "┩": "+", "╭": "+",
    "╮": "+", "╰": "+", "╯": "+", "█": "#", "▏": "|", "•": "*", "✓": "ok", "✗": "x",
})


def repetition_text(seconds: float, origin: str | None) -> str:
    """A run's TR for people: ``2 s``, or ``2 s (header only)`` when it is the image
    header's only (``origin``: ``ResolvedTiming.repetition_origin``). Every screen that
    shows a run's TR (text report, ``show``, HTML) writes it with this."""
    from slicetime.numbers import secs

    text = secs(seconds)
    return f"{text} ({HEADER_ONLY})" if origin == "header" else text


def timing_tr_text(timing: ResolvedTiming) -> str | None:
    """A run's resolved TR for people (:func:`repetition_text`), ``not usable`` when the
    sidecar's ``RepetitionTime`` is no TR in any unit, None without a TR."""
    if timing.repetition_time is not None:
        return repetition_text(timing.repetition_time, timing.repetition_origin)
    return TR_NOT_USABLE if timing.repetition_unusable else None


def ascii_text(text: str) -> str:
    """``text`` as an ASCII screen shows it ("12 × 12" → "12 x 12")."""
    return text.translate(_ASCII)


class _AsciiStream:
    """A text stream that writes :func:`ascii_text` of what it is given; everything
    else (encoding, isatty, flush, ...) is the wrapped stream's."""

    def __init__(self, stream: Any) -> None:
        self._stream = stream

    def write(self, text: str) -> int:
        self._stream.write(ascii_text(text))
        return len(text)

    def writelines(self, lines: Any) -> None:
        for line in lines:
            self.write(line)

    def __getattr__(self, name: str) -> Any:
        return getattr(self._stream, name)


def screen_stream(stream: Any) -> Any:
    """``stream`` itself when screens may use Unicode on it (:func:`unicode_wanted`),
    else a stream that writes the ASCII spelling of every character."""
    if unicode_wanted(stream) or isinstance(stream, _AsciiStream):
        return stream
    return _AsciiStream(stream)


def say(text: str, *, err: bool = False) -> None:
    """Print ``text`` (and a line break) for people on standard output, or standard
    error with ``err``, through :func:`screen_stream`: every plain line a command
    prints (one-line errors, the lines of ``fix``) goes through here, so that ASCII
    mode covers it as it covers the laid-out screens. Machine formats (JSON) are
    printed as they are, never through here."""
    import sys

    import click

    click.echo(text, file=screen_stream(sys.stderr if err else sys.stdout))


def ellipsis(unicode: bool = True) -> str:
    return "…" if unicode else "..."


def shorten_path(path: str, room: int | None, *, unicode: bool = True) -> str:
    """``path`` shortened in the middle to at most ``room`` characters: the first
    folder and the file name stay whole while they fit (``sub-01/…/x_bold.nii.gz``);
    only a file name longer than the room loses its own middle."""
    if room is None or len(path) <= room:
        return path
    dots = ellipsis(unicode)
    head, _, name = path.rpartition("/")
    if head:
        first = head.split("/", 1)[0]
        for lead in (f"{first}/{dots}/", f"{dots}/"):
            if len(lead) + len(name) <= room:
                # keep as much of the folders as fits, from the front
                keep = room - len(name) - len(dots) - 1
                if keep >= len(first) + 1:
                    return f"{head[:keep]}{dots}/{name}"
                return lead + name
    if room <= len(dots) + 2:
        return path[:max(room, 1)]
    left = (room - len(dots)) // 2
    right = room - len(dots) - left
    return path[:left] + dots + path[len(path) - right:]


_UNIT = re.compile(r"^(ms|s|mm|µs|us|Hz|%|×\d+)[),.;:]*$")


def _words(paragraph: str) -> list[str]:
    """The paragraph's words, a number kept with its unit (``2.5 s``: one word)."""
    words: list[str] = []
    for word in paragraph.split(" "):
        if words and _UNIT.match(word) and words[-1][-1:].isdigit():
            words[-1] = f"{words[-1]} {word}"
        else:
            words.append(word)
    return words


def wrap_words(text: str, width: int | None, first: int = 0, rest: int = 0) -> list[str]:
    """``text`` broken at spaces into lines of at most ``width`` characters, the first
    line already ``first`` characters in, the others indented by ``rest`` (returned
    without that indentation). A word longer than a line is cut only when it alone
    exceeds the line (a path-like word is shortened in the middle instead).
    Line breaks in ``text`` are kept."""
    if width is None:
        return text.split("\n")
    lines: list[str] = []
    for paragraph in text.split("\n"):
        current = ""
        used = first if not lines else rest
        for word in _words(paragraph):
            room = width - used
            candidate = f"{current} {word}" if current else word
            if len(candidate) <= room or (not current and len(word) <= room):
                current = candidate
                continue
            if current:
                lines.append(current)
                used = rest
                room = width - used
            if len(word) > room:
                word = shorten_path(word, max(room, 8)) if "/" in word else word[:max(room, 8)]
            current = word
        lines.append(current)
    return lines


#: what starts the options a message tells the user to paste (they end the message)
PASTE_STARTS = (" --accept ",)


def split_pasteable(text: str) -> tuple[str, str | None]:
    """``text`` without the options to paste it ends with, and those options (None when
    there are none). A screen prints them on a line of their own, whole: a command
    the user is told to paste is never wrapped or shortened, whatever the width."""
    found = [i for i in (text.find(start) for start in PASTE_STARTS) if i >= 0]
    if not found:
        return text, None
    at = min(found)
    return text[:at].rstrip(), text[at + 1:].strip()


def wrap_items(items: Sequence[str], width: int | None, first: int = 0, rest: int = 0,
               sep: str = "  ") -> list[str]:
    """Like :func:`wrap_words`, but each item (``(reference 0.95 s)``) stays whole on
    one line unless it alone is wider than a line."""
    if width is None:
        return [sep.join(items)]
    lines: list[str] = []
    current = ""
    for item in items:
        used = first if not lines else rest
        candidate = f"{current}{sep}{item}" if current else item
        if len(candidate) <= width - used:
            current = candidate
            continue
        if current:
            lines.append(current)
            used = rest
        if len(item) > width - used:
            parts = wrap_words(item, width, first=used, rest=rest)
            lines.extend(parts[:-1])
            current = parts[-1]
        else:
            current = item
    lines.append(current)
    return lines


def paint_lines(lines: Sequence[Line], paint: Callable[[str, str | None], str]) -> str:
    """Lines of segments as text, each segment painted with its style."""
    return "\n".join("".join(paint(text, style) for text, style in line) for line in lines)


def finding_lines(severity: str, code: str, message: str, where: str | None,
                  hint: str | None, width: int | None, *, indent: str = "  ",
                  unicode: bool = True) -> list[Line]:
    """One finding: ``severity  code  message`` (wrapped), ``at file › field``
    (the path shortened in the middle), ``→ hint`` (wrapped), continuation lines
    indented under the code. Without a width: one line per part, never wrapped."""
    word = SEVERITY_WORD[severity].ljust(SEVERITY_PAD)
    lead = f"{indent}{word}  "
    pad = " " * (len(indent) + FINDING_INDENT)
    out: list[Line] = []
    head = f"{code}  {message}" if message else code
    body = wrap_words(head, width, first=len(lead), rest=len(pad))
    first = body[0]
    if first.startswith(code):
        out.append([(indent, None), (word, severity), ("  ", None), (code, "bold"),
                    (first[len(code):], None)])
    else:  # the code alone was too wide for the first line
        out.append([(indent, None), (word, severity), ("  ", None), (first, "bold")])
    out.extend([(pad + line, None)] for line in body[1:])
    if where:
        arrow_at = "at "
        room = None if width is None else width - len(pad) - len(arrow_at)
        file, sep, field = where.partition(" › ")
        if room is not None and len(where) > room:
            keep = room - (len(sep) + len(field) if sep else 0)
            where = shorten_path(file, max(keep, 12), unicode=unicode) + (
                sep + field if sep else "")
            if len(where) > room:
                where = shorten_path(where, room, unicode=unicode)
        out.append([(f"{pad}{arrow_at}{where}", "dim")])
    if hint:
        arrow = "→ " if unicode else "-> "
        lines = wrap_words(hint, width, first=len(pad) + len(arrow),
                           rest=len(pad) + len(arrow))
        out.append([(f"{pad}{arrow}{lines[0]}", "italic")])
        out.extend([(f"{pad}{' ' * len(arrow)}{line}", "italic")] for line in lines[1:])
    return out


def strip_path_prefix(message: str, *paths: str | None) -> str:
    """``message`` without a leading ``PATH: `` that repeats a path the line already
    shows (readers word their errors for stderr, where the path is needed)."""
    for path in paths:
        if path and message.startswith(path + ": ") and len(message) > len(path) + 2:
            return message[len(path) + 2:]
    return message


__all__ = ["FINDING_INDENT", "MIN_WIDTH", "SEVERITY_WORD", "finding_lines", "paint_lines",
           "shorten_path", "strip_path_prefix", "width_for", "wrap_words"]
