"""Timing diagrams as SVG, drawn with matplotlib (no display needed).

Two steps, so that a report draws each distinct picture once:

- :func:`diagram_spec` turns a run record into a :class:`DiagramSpec`, a small
  hashable value holding everything the picture shows (times rounded to
  0.1 ms, the acquisition window, the axis, the default reference time, the
  problems to mark). Runs with equal specs get the same drawing.
- :func:`render_svg` draws one spec to an SVG string whose ids all start with
  a given prefix, so several drawings can live in one HTML document.

The picture: slice index (data-array order) up, time within the volume right;
one marker per slice, the slices of one excitation group joined by a bar, a
faint line through the groups in acquisition order, the acquisition window
shaded, the default reference time as a dashed line, and problems in the
problem colour (slices outside the window, uneven gaps). A run without usable
timing gets a placeholder picture that says why.
"""

from __future__ import annotations

import io
import re
import textwrap
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from slicetime.engines.plan import DEFAULT_REFERENCE, PlanError, ReferenceChoice, reference_time
from slicetime.interfaces.safe_text import xml_safe
from slicetime.model import RunRecord, before_start
from slicetime.numbers import SCREEN_S_DECIMALS, secs
from slicetime.words import count, encoding_direction

#: our own palette (also used by the HTML report for the matching legend)
COLOURS = {
    "slice": "#1f6f78",  # deep teal
    "group": "#1f6f78",
    "path": "#9bb7ba",
    "window": "#eef4f1",
    "delay": "#e6e2da",
    "beyond": "#fbe9e4",
    "problem": "#b3261e",  # brick red
    "uneven": "#e8a33d",  # ochre
    "reference": "#6a3d9a",  # plum
    "edge": "#5c6b6e",
    "text": "#263238",
}

#: times and windows are compared and labelled at this resolution (seconds): the 10 µs
#: every screen uses (``numbers.SCREEN_S_DECIMALS``), so a drawing's labels show the
#: digits ``correct`` and ``show`` print
RESOLUTION_DECIMALS = SCREEN_S_DECIMALS

#: figure size in inches, and the user-space size of the SVG at 72 dpi
FIGSIZE = (7.2, 3.0)

#: typed Any: matplotlib's stubs type rc keys as one Literal union, which a dict
#: literal's inferred type never matches
_RC: Any = {
    "svg.hashsalt": "slicetime",  # deterministic ids
    "svg.fonttype": "none",  # real text: small, selectable, printed crisply
    "font.family": "sans-serif",
    "font.sans-serif": ["DejaVu Sans"],
    "font.size": 8.5,
    "axes.edgecolor": COLOURS["edge"],
    "axes.labelcolor": COLOURS["text"],
    "xtick.color": COLOURS["edge"],
    "ytick.color": COLOURS["edge"],
    "text.color": COLOURS["text"],
    "axes.spines.top": False,
    "axes.spines.right": False,
}


@dataclass(frozen=True)
class DiagramSpec:
    """Everything one timing diagram shows; equal specs give equal drawings.

    ``kind`` is ``schedule`` (a real diagram) or ``placeholder`` (``message``
    says why there is none). ``groups`` are the excitation groups in
    acquisition order. ``late`` and ``early`` are slices at or after the end of
    the window and before 0; ``uneven_after`` are positions ``k`` in ``groups``
    where the gap to group ``k + 1`` differs from the usual spacing.
    """

    kind: str
    times: tuple[float, ...] = ()
    groups: tuple[tuple[int, ...], ...] = ()
    label: str = ""
    repetition_time: float | None = None
    window: float | None = None
    window_name: str = ""
    axis: str = "k"
    direction: str = "+"
    reference: float | None = None
    reference_note: str = ""
    late: tuple[int, ...] = ()
    early: tuple[int, ...] = ()
    uneven_after: tuple[int, ...] = ()
    message: str = ""

    @property
    def problems(self) -> bool:
        return bool(self.late or self.early or self.uneven_after)

    def caption(self) -> str:
        """One line saying what the picture marks (for alt text and reports)."""
        if self.kind != "schedule":
            return f"no timing diagram: {self.message}"
        return f"{self.label or 'scheme unknown'}, {self.detail()}"

    def detail(self) -> str:
        """The caption without the scheme label (a run's section names the scheme once,
        beside the run): slices, excitation groups, what the picture marks."""
        if self.kind != "schedule":
            return f"no timing diagram: {self.message}"
        parts = [slices_phrase(len(self.times), self.groups)]
        if self.late:
            parts.append(f"{count(len(self.late), 'slice')} at or after the end of the window")
        if self.early:
            parts.append(f"{count(len(self.early), 'slice')} before 0 s")
        if self.uneven_after:
            parts.append(f"{count(len(self.uneven_after), 'uneven gap')}")
        return ", ".join(parts)


def slices_phrase(n_slices: int, groups: Sequence[Sequence[int]]) -> str:
    """``18 slices, one at a time`` (single-band: a group per slice is no news) or
    ``24 slices in 8 excitation groups of 3`` (``… groups of 2 to 3`` when uneven)."""
    if not groups or all(len(g) == 1 for g in groups):
        return f"{count(n_slices, 'slice')}, one at a time"
    sizes = sorted({len(g) for g in groups})
    size = str(sizes[0]) if len(sizes) == 1 else f"{sizes[0]} to {sizes[-1]}"
    return f"{count(n_slices, 'slice')} in {count(len(groups), 'excitation group')} of {size}"


def _r(value: float) -> float:
    return round(float(value), RESOLUTION_DECIMALS)


#: how the diagram names each kind of window (model.SliceSchedule.window)
_WINDOW_NAMES = {
    "RepetitionTime - DelayTime": "TR − DelayTime",
    "FrameAcquisitionDuration": "acquisition time",
    "RepetitionTime": "TR",
    "the shortest VolumeTiming interval": "VolumeTiming spacing",
}


def placeholder_message(record: RunRecord) -> str:
    """Why a run has no timing diagram, in words."""
    if record.header is None:
        return "the image could not be read (see the findings)"
    if record.timing_problems:
        return "; ".join(xml_safe(p.message) for p in record.timing_problems)
    return "no slice timing: neither the sidecars nor the NIfTI header give it"


def diagram_spec(record: RunRecord) -> DiagramSpec:
    """The picture of one run (pure: no drawing, no I/O)."""
    timing = record.timing
    # drawn in seconds, as resolved (SliceTiming in milliseconds is drawn ÷ 1000)
    schedule = timing.seconds_schedule()
    if schedule is None or not schedule.times:
        return DiagramSpec("placeholder", message=placeholder_message(record))
    times = tuple(_r(t) for t in schedule.times)
    window = timing.window
    window_name = _WINDOW_NAMES.get(timing.window_kind.value, timing.window_name)
    scheme = record.scheme
    if scheme is not None:
        groups = tuple(tuple(g) for g in scheme.groups)
        label = scheme.label
        kind = str(scheme.evidence.get("kind", "")) if not scheme.regular else ""
        uneven: tuple[int, ...] = ()
        if kind == "uneven-gaps":
            uneven = tuple(
                int(k)
                for k in scheme.evidence.get(
                    "pause_after_group", scheme.evidence.get("uneven_after_group", ())
                )
            )
    else:
        order = sorted(range(len(times)), key=lambda i: (times[i], i))
        groups = tuple((i,) for i in order)
        label, uneven = "", ()
    late = tuple(i for i in timing.outside if not before_start(schedule.times[i]))
    early = tuple(i for i in timing.outside if before_start(schedule.times[i]))
    reference: float | None = None
    note = f"default reference ({DEFAULT_REFERENCE})"
    try:
        reference = _r(reference_time(ReferenceChoice.parse(DEFAULT_REFERENCE), schedule))
    except PlanError:
        note = "no default reference: it would fall outside the window"
    return DiagramSpec(
        "schedule",
        times=times,
        groups=groups,
        label=label,
        repetition_time=_r(schedule.repetition_time) if schedule.repetition_time else None,
        window=_r(window) if window is not None else None,
        window_name=window_name,
        axis=schedule.axis,
        direction=schedule.direction,
        reference=reference,
        reference_note=note,
        late=late,
        early=early,
        uneven_after=uneven,
    )


# --------------------------------------------------------------------------- drawing


def render_svg(spec: DiagramSpec, prefix: str) -> tuple[str, tuple[float, float]]:
    """Draw ``spec``; returns the SVG's inner markup (ids prefixed) and its viewBox size.

    The markup is the content of the ``<svg>`` element without the XML
    prologue, the DOCTYPE and the metadata block, ready to sit inside an
    ``<svg>`` or ``<symbol>`` of an HTML document.
    """
    import matplotlib
    from matplotlib.backends.backend_svg import FigureCanvasSVG
    from matplotlib.figure import Figure

    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=FIGSIZE, dpi=72)
        FigureCanvasSVG(fig)
        if spec.kind == "schedule":
            _draw_schedule(fig, spec)
        else:
            _draw_placeholder(fig, spec)
        buffer = io.StringIO()
        fig.savefig(buffer, format="svg", metadata={"Date": None})
    return _embeddable(buffer.getvalue(), prefix)


def _draw_schedule(fig: Any, spec: DiagramSpec) -> None:
    """The timing diagram: the acquisition window and what lies beyond it, the
    excitation groups in acquisition order, the slices, the reference time, then the
    labels and the legend, drawn in this order (the SVG's element order follows it)."""
    from matplotlib.ticker import MaxNLocator

    ax = fig.add_axes((0.075, 0.16, 0.625, 0.7))
    times = spec.times
    window = spec.window
    tr = spec.repetition_time
    right = max([t for t in (window, tr) if t is not None] + [max(times), 1e-3])
    left = min(0.0, min(times))
    pad = (right - left) * 0.04
    ax.set_xlim(left - pad, right + pad)
    ax.set_ylim(-0.8, len(times) - 0.2)
    ax.yaxis.set_major_locator(MaxNLocator(integer=True, nbins=8))
    handles: list[Any] = []
    if window is not None:
        handles += _draw_window(ax, spec, window, (left - pad, right + pad))
    handles += _draw_groups(ax, spec)
    handles += _draw_slices(ax, spec)
    if spec.reference is not None:
        handles += _draw_reference(ax, spec, spec.reference)
    _draw_labels(fig, ax, spec, handles)


def _draw_window(ax: Any, spec: DiagramSpec, window: float,
                 limits: tuple[float, float]) -> list[Any]:
    """The acquisition window, the delay up to the TR, what lies beyond (shaded when
    slices are outside it), the window's edge and its name; the legend handles."""
    from matplotlib.patches import Patch

    tr = spec.repetition_time
    handles: list[Any] = []
    ax.axvspan(0, window, color=COLOURS["window"], zorder=0, lw=0)
    handles.append(Patch(color=COLOURS["window"], label="acquisition window"))
    if tr is not None and tr > window + 1e-9:
        ax.axvspan(
            window,
            tr,
            facecolor=COLOURS["delay"],
            edgecolor=COLOURS["edge"],
            hatch="//",
            lw=0,
            zorder=0,
        )
        handles.append(
            Patch(
                facecolor=COLOURS["delay"],
                edgecolor=COLOURS["edge"],
                hatch="//",
                label="no excitation (DelayTime)",
            )
        )
    if spec.late or spec.early:
        ax.axvspan(max(window, tr or window), limits[1], color=COLOURS["beyond"], zorder=0, lw=0)
        if spec.early:
            ax.axvspan(limits[0], 0, color=COLOURS["beyond"], zorder=0, lw=0)
    ax.axvline(window, color=COLOURS["edge"], lw=1.0, zorder=1)
    ax.annotate(
        f"{spec.window_name} {secs(window)}",
        (window, 1.0),
        xycoords=("data", "axes fraction"),
        xytext=(0, 3),
        textcoords="offset points",
        ha="center",
        va="bottom",
        fontsize=8,
        annotation_clip=False,
    )
    return handles


def _draw_groups(ax: Any, spec: DiagramSpec) -> list[Any]:
    """The acquisition order through the groups, each multiband group as one bar, the
    uneven gaps; the legend handles."""
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    times = spec.times
    handles: list[Any] = []
    # acquisition order: a faint line through the groups' lowest slices
    order_x = [times[g[0]] for g in spec.groups]
    order_y = [g[0] for g in spec.groups]
    if len(spec.groups) > 1:
        ax.plot(order_x, order_y, color=COLOURS["path"], lw=0.8, zorder=2)
        handles.append(Line2D([], [], color=COLOURS["path"], lw=0.8, label="acquisition order"))
    multiband = any(len(g) > 1 for g in spec.groups)
    for g in spec.groups:
        if len(g) > 1:
            ax.plot(
                [times[g[0]]] * 2,
                [g[0], g[-1]],
                color=COLOURS["group"],
                lw=2.2,
                alpha=0.55,
                solid_capstyle="round",
                zorder=3,
            )
    if multiband:
        handles.append(
            Line2D([], [], color=COLOURS["group"], lw=2.2, alpha=0.55, label="one excitation group")
        )

    for k in spec.uneven_after:
        if 0 <= k < len(spec.groups) - 1:
            a, b = times[spec.groups[k][0]], times[spec.groups[k + 1][0]]
            ax.axvspan(min(a, b), max(a, b), color=COLOURS["uneven"], alpha=0.35, lw=0, zorder=1)
    if spec.uneven_after:
        handles.append(Patch(color=COLOURS["uneven"], alpha=0.35, label="uneven gap"))
    return handles


def _draw_slices(ax: Any, spec: DiagramSpec) -> list[Any]:
    """Every slice at its time, those outside the window marked; the legend handles."""
    from matplotlib.lines import Line2D

    times = spec.times
    n = len(times)
    handles: list[Any] = []
    bad = set(spec.late) | set(spec.early)
    good = [i for i in range(n) if i not in bad]
    marker = 5.0 if n <= 40 else 3.5 if n <= 80 else 2.5
    ax.plot(
        [times[i] for i in good],
        good,
        ls="none",
        marker="o",
        ms=marker,
        color=COLOURS["slice"],
        zorder=4,
    )
    handles.append(
        Line2D([], [], ls="none", marker="o", ms=5, color=COLOURS["slice"], label="slice")
    )
    if bad:
        shown = sorted(bad)
        ax.plot(
            [times[i] for i in shown],
            shown,
            ls="none",
            marker="X",
            ms=marker + 2,
            color=COLOURS["problem"],
            zorder=5,
        )
        handles.append(
            Line2D(
                [],
                [],
                ls="none",
                marker="X",
                ms=7,
                color=COLOURS["problem"],
                label="outside the window",
            )
        )
    return handles


def _draw_reference(ax: Any, spec: DiagramSpec, reference: float) -> list[Any]:
    """The reference time the correction aligns to, as a dashed line with its value."""
    from matplotlib.lines import Line2D

    handles: list[Any] = []
    ax.axvline(reference, color=COLOURS["reference"], lw=1.2, ls=(0, (4, 3)), zorder=6)
    handles.append(
        Line2D(
            [],
            [],
            color=COLOURS["reference"],
            lw=1.2,
            ls=(0, (4, 3)),
            label=spec.reference_note,
        )
    )
    ax.annotate(
        secs(reference),
        (reference, 1.0),
        xycoords=("data", "axes fraction"),
        xytext=(3, -3),
        textcoords="offset points",
        ha="left",
        va="top",
        fontsize=8,
        color=COLOURS["reference"],
        bbox={"boxstyle": "round,pad=0.15", "fc": "white", "ec": "none", "alpha": 0.85},
        annotation_clip=False,
        zorder=7,
    )
    return handles


def _draw_labels(fig: Any, ax: Any, spec: DiagramSpec, handles: list[Any]) -> None:
    """Axis labels, the title, the legend and the notes of what the drawing lacks."""
    n = len(spec.times)
    window = spec.window
    ax.set_xlabel("time within the volume (s)")
    ax.set_ylabel(f"slice index, axis {encoding_direction(spec.axis, spec.direction)}")
    # the scheme's label is beside the drawing wherever it is shown (run row, gallery
    # caption): the title says what only the picture knows
    ax.set_title(
        slices_phrase(n, spec.groups),
        loc="left",
        fontsize=9.5,
        pad=16,
        parse_math=False,
    )
    notes: list[str] = []
    if spec.reference is None:
        notes.append(spec.reference_note)
    if window is None:
        notes.append("no repetition time: window unknown")
    legend = fig.legend(
        handles=handles,
        loc="upper left",
        bbox_to_anchor=(0.735, 0.9),
        frameon=False,
        fontsize=7.5,
        handlelength=1.6,
        borderaxespad=0,
    )
    for text in legend.get_texts():
        text.set_parse_math(False)
    if notes:
        fig.text(
            0.74,
            0.16,
            "\n".join(textwrap.fill(n, 34) for n in notes),
            fontsize=7.5,
            color=COLOURS["problem"],
            va="bottom",
            parse_math=False,
        )


def _draw_placeholder(fig: Any, spec: DiagramSpec) -> None:
    from matplotlib.patches import FancyBboxPatch

    fig.patches.append(
        FancyBboxPatch(
            (0.03, 0.08),
            0.94,
            0.84,
            boxstyle="round,pad=0.01",
            transform=fig.transFigure,
            facecolor="#f6f4f0",
            edgecolor=COLOURS["edge"],
            ls=(0, (5, 4)),
            lw=1.0,
        )
    )
    fig.text(
        0.5,
        0.62,
        "no timing diagram",
        ha="center",
        va="center",
        fontsize=14,
        color=COLOURS["problem"],
        parse_math=False,
    )
    wrapped = "\n".join(textwrap.wrap(spec.message, 90)[:4])
    fig.text(
        0.5,
        0.38,
        wrapped,
        ha="center",
        va="center",
        fontsize=9,
        color=COLOURS["text"],
        parse_math=False,
    )


_ROOT = re.compile(r"<svg\b([^>]*)>(.*)</svg>\s*\Z", re.S)
_VIEWBOX = re.compile(r'viewBox="0 0 ([0-9.]+) ([0-9.]+)"')
_METADATA = re.compile(r"<metadata>.*?</metadata>\s*", re.S)
_STYLE = re.compile(r"<style[^>]*>.*?</style>\s*", re.S)
_ID = re.compile(r'\bid="([^"]+)"')


def _embeddable(svg: str, prefix: str) -> tuple[str, tuple[float, float]]:
    """The inner markup of a matplotlib SVG, ids prefixed, without URL-bearing parts."""
    match = _ROOT.search(svg)
    if match is None:  # pragma: no cover - matplotlib always writes one root element
        raise ValueError("not an SVG document")
    attributes, body = match.groups()
    box = _VIEWBOX.search(attributes)
    size = (float(box.group(1)), float(box.group(2))) if box else (576.0, 244.8)
    body = _METADATA.sub("", body)
    body = _STYLE.sub("", body)  # its one rule is in the report's style sheet
    used = set(re.findall(r"url\(#([^)]+)\)", body))
    used |= set(re.findall(r'href="#([^"]+)"', body))

    def keep(m: re.Match[str]) -> str:  # only referenced ids survive, with the prefix
        return f'id="{prefix}{m.group(1)}"' if m.group(1) in used else ""

    body = _ID.sub(keep, body)
    body = re.sub(r"url\(#([^)]+)\)", lambda m: f"url(#{prefix}{m.group(1)})", body)
    body = re.sub(r'href="#([^"]+)"', lambda m: f'href="#{prefix}{m.group(1)}"', body)
    body = body.replace("xlink:href=", "href=")
    body = re.sub(r"<defs>\s*</defs>\s*", "", body)
    return body.strip(), size


__all__ = ["COLOURS", "DiagramSpec", "diagram_spec", "placeholder_message", "render_svg"]
