"""Numbers for people and for files: the one place that decides how a value is
rounded and written (model layer: no I/O, used by every layer above).

* JSON (reports, plans, sidecars the tool writes): times in seconds to 1 µs
  (:func:`json_time`); the values a finding rests on (its evidence, mostly times)
  to 12 significant digits and then to 6 decimals, i.e. 1 µs for a time
  (:func:`json_float`), so float noise such as ``0.44999999999999996`` never
  reaches a file a person reads.
* Screens (terminal, HTML, messages): fixed-point, never scientific notation,
  trailing zeros dropped. Times have one resolution everywhere, 10 µs: seconds
  with at most 5 decimals (:func:`secs`), milliseconds with at most 2 (:func:`ms`),
  durations below one second in milliseconds (:func:`duration`); a drawing
  rounds to the same 5 decimals, so the HTML, ``correct``, ``show`` and the
  screens built from sidecars print the same digits. A value whose unit is in
  doubt (milliseconds where seconds are due) is written as a bare number and
  never called seconds (:func:`as_written`). Whole numbers of 10,000 and more are
  grouped by thousands (:func:`grouped`), byte counts carry their unit
  (:func:`size_words`: ``109,400 bytes``), and any other float is written with at most
  6 significant digits (:func:`plain`): no raw float reaches a screen.
* A value too large to write out (:data:`HUGE` and beyond: a header's ``scl_slope``
  of 1e39, a SliceTiming entry of 1e308) is written as a power of ten,
  ``1 × 10^39`` (:func:`powers`), as is a non-zero value too small for 6 decimals
  that :func:`plain` is asked for (a slope of 1e-9 is not ``0``); a time keeps its
  fixed 10 µs resolution (``secs(1e-9)`` is ``0 s``).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Mapping
from typing import Any

#: decimals of a time in seconds in JSON (1 µs)
JSON_TIME_DECIMALS = 6
#: significant digits of any other float in JSON
JSON_SIGNIFICANT = 12
#: decimals of milliseconds on screens
SCREEN_MS_DECIMALS = 2
#: decimals of seconds on screens (the same 10 µs as the milliseconds)
SCREEN_S_DECIMALS = 5


#: from here on a number is shown as a power of ten (``1 × 10^308``), never written out
#: in full: a double holds 15 to 17 significant decimal digits (IEEE 754 binary64), the
#: rest is noise
HUGE = 1e15
#: below this a non-zero :func:`plain` value is shown as a power of ten: 6 decimals
#: (1 µs for a time in seconds) would write it as 0
TINY = 0.5e-6


def _finite(value: float) -> bool:
    return not (math.isnan(value) or math.isinf(value))


def _finite_float(value: object) -> float | None:
    """``value`` when it is a finite float; None for anything else (a whole number, a
    bool, NaN, an infinity, text), which the formatters write as ``str`` gives it."""
    if isinstance(value, float) and _finite(value):
        return value
    return None


def json_time(value: float) -> float:
    """A time in seconds for JSON: rounded to 1 µs (``-0.0`` becomes ``0.0``)."""
    if not _finite(value):
        return value
    return round(value, JSON_TIME_DECIMALS) + 0.0


def json_times(values: Any) -> list[float]:
    """Times for JSON (:func:`json_time` each). Runs of a dataset share a few schedules,
    so the rounding of a tuple is remembered (a new list is returned every time)."""
    if isinstance(values, tuple):
        return list(_json_times_of(values))
    return [json_time(float(v)) for v in values]


@functools.lru_cache(maxsize=1024)
def _json_times_of(values: tuple[float, ...]) -> tuple[float, ...]:
    return tuple(json_time(float(v)) for v in values)


def json_float(value: float) -> float:
    """A float for JSON: 12 significant digits, then at most 6 decimals (1 µs)."""
    if not _finite(value) or value == 0:
        return value + 0.0 if value == 0 else value
    # one rounding, to whichever is coarser: rounding to 12 digits and then to 6 decimals
    # could move a value by more than half a microsecond (10000.6807214823 → …722)
    digits = math.floor(math.log10(abs(value))) + 1  # before the decimal point
    return round(value, min(JSON_TIME_DECIMALS, JSON_SIGNIFICANT - digits)) + 0.0


def tidy_json(value: Any) -> Any:
    """``value`` with every float inside (mappings, lists, tuples) passed through
    :func:`json_float`; other values unchanged."""
    if isinstance(value, bool):
        return value
    if isinstance(value, float):
        return json_float(value)
    if isinstance(value, Mapping):
        return {k: tidy_json(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [tidy_json(v) for v in value]
    return value


def fixed(value: float, decimals: int) -> str:
    """``value`` with at most ``decimals`` decimals, trailing zeros dropped, never in
    scientific notation (``fixed(138888.9, 2)`` is ``138888.9``)."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        return str(value)
    if not _finite(float(value)):
        return str(value)
    if abs(value) >= HUGE:  # digits a double does not hold: not written out
        return powers(value)
    text = f"{value:.{decimals}f}"
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return "0" if text in ("-0", "") else text


def plain(value: object, significant: int = 6) -> str:
    """Like ``format(value, "g")`` (``significant`` digits) but never scientific:
    ``plain(138900.0)`` is ``138900``, ``plain(2.3611109999999997)`` is ``2.36111``.
    Small values keep at most 6 decimals (1 µs for a time in seconds); a non-zero value
    those would write as 0, or a huge one, is a power of ten (:func:`powers`)."""
    number = _finite_float(value)
    if number is None:
        return str(value)
    if number == 0:
        return "0"
    if abs(number) < TINY or abs(number) >= HUGE:  # 6 decimals would say 0; too long
        return powers(number, significant)
    magnitude = math.floor(math.log10(abs(number)))
    decimals = min(max(significant - 1 - magnitude, 0), 6)
    return fixed(round(number, decimals), decimals)


def powers(value: float, significant: int = 6) -> str:
    """A finite non-zero number as a power of ten for people, never in scientific
    notation: ``1 × 10^39``, ``-2.5 × 10^-9`` (the mantissa with at most
    ``significant`` digits, trailing zeros dropped)."""
    # the "e" format rounds the mantissa and carries into the exponent (9.9999999e38
    # becomes 1.00000e+39): both are read from its text
    mantissa, _, exponent = f"{value:.{max(significant, 1) - 1}e}".partition("e")
    if "." in mantissa:
        mantissa = mantissa.rstrip("0").rstrip(".")
    return f"{mantissa} × 10^{int(exponent)}"


def grouped(value: int) -> str:
    """A whole number for people: thousands separated by commas from 10,000 on
    (``109,400``; ``2048`` stays as it is, as four-digit numbers usually are)."""
    if isinstance(value, bool) or not isinstance(value, int):
        return plain(value)
    return f"{value:,}" if abs(value) >= 10_000 else str(value)


def size_words(n_bytes: int) -> str:
    """A byte count for people: grouped, with its unit (``109,400 bytes``, ``1 byte``)."""
    return f"{grouped(n_bytes)} {'byte' if n_bytes == 1 else 'bytes'}"


def amount(n_bytes: float) -> str:
    """A large byte count in binary units, one decimal (``1.5 GiB``); below 1 KiB exact."""
    for unit, scale in (("TiB", 1 << 40), ("GiB", 1 << 30), ("MiB", 1 << 20), ("KiB", 1 << 10)):
        if n_bytes >= scale:
            return f"{n_bytes / scale:.1f} {unit}"
    return size_words(int(n_bytes))


def as_written(value: float) -> str:
    """A number from a file whose unit is in doubt, as the file has it (at most 6
    significant digits, 2 decimals from 100 on, never scientific, no unit)."""
    if isinstance(value, int | float) and not isinstance(value, bool) and _finite(value):
        if abs(value) >= HUGE:
            return fixed(value, 2)
        if abs(value) >= 10_000:
            whole, _, decimals = fixed(value, 2).partition(".")
            return f"{int(whole):,}" + (f".{decimals}" if decimals else "")
        if abs(value) >= 100:
            return fixed(value, 2)
    return plain(value)


def shown(value: object) -> str:
    """Any number on a screen whose unit the screen does not know (a finding's
    grounds): 6 significant digits and at most 5 decimals (the 10 µs of a time in
    seconds), grouped from 10,000 on, never scientific."""
    if isinstance(value, int) and not isinstance(value, bool):
        return grouped(value)
    number = _finite_float(value)
    if number is None:
        return str(value)
    if abs(number) >= 10_000:
        return as_written(number)
    if abs(number) < TINY:  # most grounds are times: the screen's 10 µs says 0
        return fixed(number, SCREEN_S_DECIMALS)
    text = plain(number)
    decimals = text.partition(".")[2]
    return fixed(number, SCREEN_S_DECIMALS) if len(decimals) > SCREEN_S_DECIMALS else text


def ratio(value: float) -> str:
    """A fraction of a time (``StartTime / RepetitionTime``) for people: at most 5
    decimals, the resolution of the times it divides (``0.23438``)."""
    return fixed(value, SCREEN_S_DECIMALS)


def ms(seconds: float) -> str:
    """Seconds shown as milliseconds: ``138.89 ms`` (at most 2 decimals)."""
    return f"{fixed(seconds * 1000.0, SCREEN_MS_DECIMALS)} ms"


def secs(seconds: float | None) -> str:
    """Seconds shown as seconds: ``2.5 s`` (at most 5 decimals); None: ``unknown``."""
    if seconds is None:
        return "unknown"
    return f"{fixed(seconds, SCREEN_S_DECIMALS)} s"


def duration(seconds: float) -> str:
    """A duration for people: milliseconds below one second, else seconds."""
    if _finite(seconds) and abs(seconds) < 1.0:
        return ms(seconds)
    return secs(seconds)


__all__ = ["amount", "as_written", "duration", "fixed", "grouped", "json_float", "json_time",
           "json_times", "ms", "plain", "powers", "ratio", "secs", "shown", "size_words",
           "tidy_json"]
