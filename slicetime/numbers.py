"""Numbers for people and for files: the one place that decides how a value is
rounded and written (model layer: no I/O, used by every layer above).

* JSON (reports, plans, sidecars the tool writes): times in seconds to 1 µs
  (:func:`json_time`); the values a finding rests on (its evidence, mostly times)
  to 12 significant digits and then to 6 decimals, i.e. 1 µs for a time
  (:func:`json_float`), so float noise such as ``0.44999999999999996`` never
  reaches a file a person reads.
* Screens (terminal, HTML, messages): fixed-point, never scientific notation,
  trailing zeros dropped; durations below one second in milliseconds with at
  most 2 decimals (:func:`duration`), seconds with at most 5 (the same 10 µs).
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


def _finite(value: float) -> bool:
    return not (math.isnan(value) or math.isinf(value))


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
    text = f"{value:.{decimals}f}"
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return "0" if text in ("-0", "") else text


def plain(value: object, significant: int = 6) -> str:
    """Like ``format(value, "g")`` (``significant`` digits) but never scientific:
    ``plain(138900.0)`` is ``138900``, ``plain(2.3611109999999997)`` is ``2.36111``.
    Tiny values keep at most 6 decimals (1 µs for a time in seconds)."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        return str(value)
    if isinstance(value, int):
        return str(value)
    if not _finite(value):
        return str(value)
    if value == 0:
        return "0"
    magnitude = math.floor(math.log10(abs(value)))
    decimals = min(max(significant - 1 - magnitude, 0), 6)
    return fixed(round(value, decimals), decimals)


def ms(seconds: float) -> str:
    """Seconds shown as milliseconds: ``138.89 ms`` (at most 2 decimals)."""
    return f"{fixed(seconds * 1000.0, SCREEN_MS_DECIMALS)} ms"


def secs(seconds: float) -> str:
    """Seconds shown as seconds: ``2.5 s`` (at most 5 decimals)."""
    return f"{fixed(seconds, SCREEN_S_DECIMALS)} s"


def duration(seconds: float) -> str:
    """A duration for people: milliseconds below one second, else seconds."""
    if _finite(seconds) and abs(seconds) < 1.0:
        return ms(seconds)
    return secs(seconds)


__all__ = ["duration", "fixed", "json_float", "json_time", "json_times", "ms", "plain",
           "secs", "tidy_json"]
