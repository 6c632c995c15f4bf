"""A compact text picture of a schedule: slice index (rows) against time (columns).

Pure string building, no terminal access: the caller chooses Unicode or
plain ASCII. The highest slice index is drawn at the top so that, for an
axial acquisition along +k, the picture reads like the head.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

from slicetime.numbers import secs

#: (marker, empty cell, axis rule) for each character set
_GLYPHS = {True: ("●", "·", "─"), False: ("#", ".", "-")}


def order_diagram(
    times: Sequence[float],
    window: float | None,
    *,
    width: int = 48,
    max_rows: int = 40,
    unicode: bool = True,
) -> list[str]:
    """Rows of text showing when each slice was acquired within ``window`` seconds.

    Each row is one slice (or, beyond ``max_rows`` slices, a band of adjacent
    slices); a marker sits at the column of the slice's time. Slices of one
    multiband group share a column. The last lines are a time axis; it starts at 0 s,
    or at the earliest time when a slice lies before 0 (a time the data give, never one
    they do not), with the 0 s column ticked on the axis rule.
    """
    if not times:
        return []
    mark, empty, rule = _GLYPHS[unicode]
    n = len(times)
    start = min(0.0, min(times))  # a negative time is drawn where it is, never at 0 s
    end = window if window and window > 0 else max(max(times), 1e-9) * 1.0001
    end = max(end, max(times) * 1.0001, 1e-9)
    span = end - start
    per_row = max(1, math.ceil(n / max_rows))
    label_width = len(f"{n - 1}") * (2 if per_row > 1 else 1) + (1 if per_row > 1 else 0)
    lines: list[str] = []
    for top in range(n - 1, -1, -per_row):
        members = range(max(0, top - per_row + 1), top + 1)
        cells = [empty] * width
        for s in members:
            t = times[s]
            col = min(width - 1, max(0, int((t - start) / span * width)))
            cells[col] = mark
        label = f"{members[0]}" if per_row == 1 else f"{members[0]}-{members[-1]}"
        lines.append(f"{label:>{label_width}} │{''.join(cells)}│" if unicode
                     else f"{label:>{label_width}} |{''.join(cells)}|")
    pad = " " * label_width
    axis = [rule] * width
    if start < 0:  # where 0 s lies on an axis that starts before it
        axis[min(width - 1, int(-start / span * width))] = "┴" if unicode else "+"
    lines.append(f"{pad} {'└' if unicode else '+'}{''.join(axis)}{'┘' if unicode else '+'}")
    left, right = secs(start), secs(end)
    lines.append(f"{pad}  {left}{' ' * max(1, width - len(left) - len(right))}{right}")
    return lines
