"""A corrected run's events table, restated when ``correct --omit-leading N`` leaves
out its first volumes.

BIDS counts event onsets from the first volume stored in the run's file (and allows
negative onsets, for events before it), so the output's events are the input's table
(found by the inheritance principle, :mod:`slicetime.readers.events`) with every onset
made earlier by the time from the first volume to volume N; events now before the
first volume keep their negative onsets. The table is written beside the output image
(``sub-01_task-x_desc-<desc>_events.tsv``: the entities an events file may carry, so
the echoes of a run share it), named in the output sidecar's provenance (``Events``)
and among its inputs (a changed table makes the output out of date). Without
``--omit-leading`` the input's table holds for the output as it is: none is written,
and one an earlier output recorded is removed (:func:`recorded_events`).
"""

from __future__ import annotations

from dataclasses import dataclass
from decimal import Decimal
from pathlib import Path
from typing import Any

from slicetime.model import RunRecord, SliceSchedule
from slicetime.pipelines.provenance import hash_inputs, json_safe, provenance_entry
from slicetime.readers.atomic import link_between, write_atomic
from slicetime.readers.errors import ReadError, open_regular, read_bounded
from slicetime.readers.events import (
    ShiftedEvents,
    events_name,
    find_events,
    read_events,
    shift_onsets,
)
from slicetime.readers.record import relative_display
from slicetime.readers.volumes import file_sha256


@dataclass(frozen=True)
class RestatedEvents:
    """The run's events table restated for the volumes kept."""

    source: str  # relative to the run's dataset root
    sha256: str  # of the source file
    output: Path  # beside the output image
    rel: str  # the same, relative to --out
    shifted: ShiftedEvents

    def record(self) -> dict[str, Any]:
        """What the output sidecar's provenance says of it."""
        return {"Source": self.source, "Output": self.rel,
                "OnsetShift": float(self.shifted.shift), "Events": self.shifted.events,
                "BeforeFirstVolume": self.shifted.before_first}


def shift_seconds(schedule: SliceSchedule, omitted: int) -> Decimal:
    """The time from the first volume to the first volume kept, exactly as the sidecar
    states it (``N x RepetitionTime``, or the difference of two ``VolumeTiming``
    entries: the output's ``VolumeTiming`` is moved by the same amount)."""
    if schedule.volume_times is not None:
        times = schedule.volume_times
        return Decimal(repr(times[omitted])) - Decimal(repr(times[0]))
    assert schedule.repetition_time is not None
    return Decimal(repr(schedule.repetition_time)) * omitted


def restate_events(record: RunRecord, omitted: int, image: Path,
                   rel: Path) -> tuple[RestatedEvents | None, str | None]:
    """The run's events table with every onset ``omitted`` volumes earlier, to be
    written beside the output ``image`` (``rel``: relative to ``--out``), and a warning
    when there is a table that cannot be found, read or restated (the run is still
    corrected; its onsets then still count from the input's first volume). ``(None,
    None)``: nothing to restate (no ``omitted``, or no table)."""
    if not omitted:
        return None, None
    root, schedule = Path(record.root), record.schedule
    assert schedule is not None
    try:
        source = find_events(root, Path(record.abs_path))
        if source is None:
            return None, None
        shown = relative_display(source, root)
        text = read_events(source, root, shown)
        shifted = shift_onsets(text, shift_seconds(schedule, omitted), shown)
        name = events_name(image.name)
    except (ValueError, ReadError) as exc:
        why = exc.message if isinstance(exc, ReadError) else str(exc)
        return None, (f"events table not restated ({why}): its onsets still count from the "
                      f"input's first volume, {omitted} volumes before the output's")
    return RestatedEvents(shown, file_sha256(source), image.with_name(name),
                          rel.with_name(name).as_posix(), shifted), None


def run_inputs(record: RunRecord, image_sha: str | None,
               events: RestatedEvents | None) -> dict[str, Any]:
    """The run's inputs (``provenance.hash_inputs``) and, when restated, its events table."""
    inputs = hash_inputs(record, image_sha)
    if events is not None:
        inputs["Events"] = json_safe({"Path": events.source, "SHA256": events.sha256})
    return inputs


def put_in_place(events: RestatedEvents) -> None:
    """Write the restated table beside its output, unless the regular file there
    already holds exactly its text (a rerun of the same batch rewrites nothing)."""
    wanted = events.shifted.text.encode("utf-8")
    try:
        fh, st = open_regular(events.output, str(events.output), what="events table")
        with fh:
            if st.st_size == len(wanted) and read_bounded(fh, st.st_size,
                                                          len(wanted)) == wanted:
                return
    except ReadError:  # none there, a link, not a regular file: written anew
        pass
    write_atomic(events.output, wanted)


def recorded_events(sidecar: Path, out: Path) -> Path | None:
    """The events table an earlier output sidecar says this tool wrote beside it (a
    path inside ``out``, not through a link), or None."""
    entry = provenance_entry(sidecar, "")
    events = entry.get("Events") if entry is not None else None
    output = events.get("Output") if isinstance(events, dict) else None
    if not isinstance(output, str) or not output or Path(output).is_absolute() \
            or ".." in Path(output).parts:
        return None
    path = out / output
    return path if link_between(path, out) is None else None


__all__ = ["RestatedEvents", "put_in_place", "recorded_events", "restate_events",
           "run_inputs", "shift_seconds"]
