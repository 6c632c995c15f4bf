"""Showing a source DICOM series: its own schedule and scheme, or beside a run's sidecar."""

from __future__ import annotations

from typing import Any

from rich.console import Console
from rich.table import Table
from rich.text import Text

from slicetime.interfaces.safe_text import xml_safe
from slicetime.model import RunRecord
from slicetime.model_source import SeriesTiming
from slicetime.numbers import fixed, json_time, json_times, secs, tidy_json
from slicetime.rules.source import correspondence, matched, source_times
from slicetime.schemes.correspond import Correspondence
from slicetime.schemes.infer import infer_scheme
from slicetime.words import count


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
        "repetition_time": None if series.repetition_time is None
        else json_time(series.repetition_time),
        "volumes": series.n_volumes,
        "slice_normal": tidy_json(list(series.normal)) if series.normal else None,
        "slices": [{"label": series.labels[i], "position_mm": round(p, 3),
                    "time": json_time(times[n]) if times is not None else None}
                   for n, (i, p) in enumerate(zip(order, positions, strict=True))],
        "times_from": series.times_source.describe() if series.times_source else None,
        "scheme": scheme.to_json() if scheme is not None else None,
        "notes": list(series.notes),
    }


def show_series(path: str, as_json: bool, console: Console) -> None:
    """`show` on a DICOM file, series folder or archive: every series it holds (one
    unreadable series among several is a line; alone, it is the command's error)."""
    from slicetime.readers.dicom import read_all_series
    from slicetime.readers.errors import ReadError

    found = read_all_series(path, path)  # ReadError: one line, exit 2
    if len(found) == 1 and isinstance(found[0], ReadError):
        raise found[0]
    if as_json:
        import click

        from slicetime.interfaces.report_json import dumps

        objects = [series_object(s) for s in found if not isinstance(s, ReadError)]
        click.echo(dumps(objects[0] if len(found) == 1 else objects))
        return
    if len(found) > 1:
        console.print(Text(f"{xml_safe(path)} holds {len(found)} series "
                           "(grouped by SeriesInstanceUID)", style="bold"))
    for series in found:
        if isinstance(series, ReadError):
            console.print(Text(f"unreadable: {xml_safe(series.message)}"))
            continue
        render_series(series, console)


def render_series(series: SeriesTiming, console: Console) -> None:
    """One series: its slice times and scheme, or one line when it records none."""
    data = series_object(series)
    from slicetime.interfaces.screen import shorten_path
    from slicetime.interfaces.terminal import emit, fit_width, pairs

    if series.times is None:
        kind = {"mosaic": "a mosaic", "enhanced": "an enhanced multi-frame series",
                "classic": "a one-slice-per-file series"}[series.layout]
        why = "; ".join(series.notes)
        console.print(Text(f"{xml_safe(series.series)}: {kind} of "
                           f"{count(series.n_slices, 'slice')} that holds no per-slice times"
                           + (f" ({xml_safe(why)})" if why else ""), overflow="fold"),
                      soft_wrap=True)
        return
    width = fit_width(console)
    console.print(Text(shorten_path(xml_safe(series.series), width), style="bold"))
    facts: list[tuple[str, str | Text]] = []
    facts.append(("layout", {"mosaic": "mosaic (tiles in one image, times in the vendor "
                             "private header)", "enhanced": "enhanced multi-frame",
                             "classic": "one slice per file"}[series.layout]))
    if series.series_number is not None:
        facts.append(("series number", str(series.series_number)))
    if series.repetition_time is not None:
        facts.append(("repetition time", secs(series.repetition_time)))
    facts.append(("slices", f"{series.n_slices}" + (
        f", {count(series.n_volumes, 'volume')}" if series.n_volumes else "")))
    if series.times_source is not None:
        facts.append(("times from", xml_safe(series.times_source.describe())))
    scheme = data["scheme"]
    facts.append(("scheme", Text(scheme["label"], style="bold") if scheme else
                  Text("unknown: no per-slice times", style="italic")))
    emit(console, pairs(facts, width))
    table = Table(show_edge=False, pad_edge=False, header_style="bold")
    table.add_column("slice (ascending along the normal)")
    table.add_column("position mm", justify="right")
    table.add_column("time ms", justify="right")
    for row in data["slices"]:
        table.add_row(row["label"], f"{row['position_mm']:.2f}",
                      "—" if row["time"] is None else fixed(row["time"] * 1000, 2))
    console.print(table)
    for note in series.notes:
        console.print(Text(f"note: {note}", style="dim"))


def run_source_object(record: RunRecord) -> dict[str, Any] | None:
    """The run's source evidence for ``show --format json`` (None when not checked)."""
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
        out["source_times"] = json_times(both[1]) if both else None
    return out


def render_run_source(record: RunRecord, console: Console) -> None:
    """The source's times beside the sidecar's, slice by slice (array order)."""
    evidence = record.source
    if evidence is None:
        return
    from slicetime.interfaces.screen import wrap_words
    from slicetime.interfaces.terminal import fit_width

    width = fit_width(console)

    def say(text: str) -> None:
        for i, part in enumerate(wrap_words(text, width, first=2, rest=4)):
            console.print(Text(("  " if i == 0 else "    ") + part))

    console.print(Text("\nsource DICOM series", style="dim"))
    found = matched(record)
    if found is None:
        why = evidence.reason or (evidence.error.message if evidence.error else "")
        say(f"{evidence.status}: {xml_safe(why)}")
        return
    series = found[1]
    say(f"{xml_safe(series.series)}  (matched by {evidence.how}; "
                  f"{series.layout}; times from "
                  f"{series.times_source.field if series.times_source else 'nowhere'})")
    corr = correspondence(record)
    if not isinstance(corr, Correspondence):
        if corr is not None:
            say(f"geometry differs: {xml_safe(corr.reason)}")
        return
    both = source_times(record)
    sidecar = record.schedule.times if record.schedule and record.timing_origin == "sidecar" \
        else None
    table = Table(show_edge=False, pad_edge=False, header_style="bold")
    table.add_column(f"slice ({'ijk'[corr.axis]})", justify="right")
    table.add_column("source slice")
    table.add_column("source ms", justify="right")
    table.add_column("sidecar ms", justify="right")
    for k, label in corr.pairs(series):
        src = fixed(both[1][k] * 1000, 2) if both else "—"
        side = fixed(sidecar[k] * 1000, 2) if sidecar is not None and k < len(sidecar) else "—"
        table.add_row(str(k), label, src, side)
    console.print(table)


__all__ = ["render_run_source", "render_series", "run_source_object", "series_object",
           "show_series"]
