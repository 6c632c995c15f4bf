"""Showing a source DICOM series: its own schedule and scheme, or beside a run's sidecar."""

from __future__ import annotations

from typing import Any

from rich.console import Console
from rich.table import Table
from rich.text import Text

from slicetime.interfaces.safe_text import xml_safe
from slicetime.model import RunRecord
from slicetime.model_source import SeriesTiming
from slicetime.numbers import plain
from slicetime.rules.source import correspondence, matched, source_times
from slicetime.schemes.correspond import Correspondence
from slicetime.schemes.infer import infer_scheme


def series_object(series: SeriesTiming) -> dict[str, Any]:
    """The series as JSON: slices ascending along its normal, with times and scheme."""
    positions, times = series.by_position()
    order = sorted(range(series.n_slices), key=lambda i: series.positions[i])
    scheme = infer_scheme(times) if times is not None and len(times) > 0 else None
    return {
        "series": series.series,
        "layout": series.layout,
        "files_read": list(series.files_read),
        "series_number": series.series_number,
        "description": series.description,
        "repetition_time": series.repetition_time,
        "volumes": series.n_volumes,
        "slice_normal": list(series.normal) if series.normal else None,
        "slices": [{"label": series.labels[i], "position_mm": round(p, 3),
                    "time": round(times[n], 6) if times is not None else None}
                   for n, (i, p) in enumerate(zip(order, positions, strict=True))],
        "times_from": series.times_source.describe() if series.times_source else None,
        "scheme": scheme.to_json() if scheme is not None else None,
        "notes": list(series.notes),
    }


def render_series(series: SeriesTiming, console: Console) -> None:
    """`show` on a DICOM file or series folder."""
    data = series_object(series)
    console.print(Text(xml_safe(series.series), style="bold"))
    facts = Table.grid(padding=(0, 2))
    facts.add_column(style="dim", no_wrap=True)
    facts.add_column()
    facts.add_row("layout", {"mosaic": "mosaic (tiles in one image, times in the vendor "
                             "private header)", "enhanced": "enhanced multi-frame",
                             "classic": "one slice per file"}[series.layout])
    if series.series_number is not None:
        facts.add_row("series number", str(series.series_number))
    if series.repetition_time is not None:
        facts.add_row("repetition time", f"{plain(series.repetition_time)} s")
    facts.add_row("slices", f"{series.n_slices}" + (f", {series.n_volumes} volumes"
                                                    if series.n_volumes else ""))
    if series.times_source is not None:
        facts.add_row("times from", xml_safe(series.times_source.describe()))
    scheme = data["scheme"]
    facts.add_row("scheme", Text(scheme["label"], style="bold") if scheme else
                  Text("unknown: no per-slice times", style="italic"))
    console.print(facts)
    table = Table(show_edge=False, pad_edge=False, header_style="bold")
    table.add_column("slice (ascending along the normal)")
    table.add_column("position mm", justify="right")
    table.add_column("time s", justify="right")
    for row in data["slices"]:
        table.add_row(row["label"], f"{row['position_mm']:.2f}",
                      "—" if row["time"] is None else f"{row['time']:.4f}")
    console.print(table)
    for note in series.notes:
        console.print(Text(f"note: {note}", style="dim"))


def run_source_object(record: RunRecord) -> dict[str, Any] | None:
    """The run's source evidence for ``show --json`` (None when not checked)."""
    evidence = record.source
    if evidence is None:
        return None
    out: dict[str, Any] = {"status": evidence.status, "how": evidence.how,
                           "candidates": list(evidence.candidates), "reason": evidence.reason}
    found = matched(record)
    if found is not None:
        out["series"] = series_object(found[1])
        corr = correspondence(record)
        if isinstance(corr, Correspondence):
            out["correspondence"] = [[k, label] for k, label in corr.pairs(found[1])]
        both = source_times(record)
        out["source_times"] = [round(t, 6) for t in both[1]] if both else None
    return out


def render_run_source(record: RunRecord, console: Console) -> None:
    """The source's times beside the sidecar's, slice by slice (array order)."""
    evidence = record.source
    if evidence is None:
        return
    console.print(Text("\nsource DICOM series", style="dim"))
    found = matched(record)
    if found is None:
        why = evidence.reason or (evidence.error.message if evidence.error else "")
        console.print(f"  {evidence.status}: {xml_safe(why)}")
        return
    series = found[1]
    console.print(f"  {xml_safe(series.series)}  (matched by {evidence.how}; "
                  f"{series.layout}; times from "
                  f"{series.times_source.field if series.times_source else 'nowhere'})")
    corr = correspondence(record)
    if not isinstance(corr, Correspondence):
        if corr is not None:
            console.print(f"  geometry differs: {xml_safe(corr.reason)}")
        return
    both = source_times(record)
    sidecar = record.schedule.times if record.schedule and record.timing_origin == "sidecar" \
        else None
    table = Table(show_edge=False, pad_edge=False, header_style="bold")
    table.add_column(f"slice ({'ijk'[corr.axis]})", justify="right")
    table.add_column("source slice")
    table.add_column("source s", justify="right")
    table.add_column("sidecar s", justify="right")
    for k, label in corr.pairs(series):
        src = f"{both[1][k]:.4f}" if both else "—"
        side = f"{sidecar[k]:.4f}" if sidecar is not None and k < len(sidecar) else "—"
        table.add_row(str(k), label, src, side)
    console.print(table)


__all__ = ["render_run_source", "render_series", "run_source_object", "series_object"]
