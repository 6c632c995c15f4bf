"""A run's events table (BIDS ``events.tsv``): which file applies, read confined and
bounded, and its onsets restated for a run whose first volumes were left out.

BIDS (``onset``, and ``NumberOfVolumesDiscardedByUser``): an onset is measured from
the beginning of the acquisition of the first volume *stored* in the run's file;
negative onsets are allowed, for events before that first stored volume. So when
``correct --omit-leading N`` leaves out the first N volumes, the output's events are
the input's with every onset made earlier by the time from the first volume to volume
N (``N x RepetitionTime``, or the difference of their ``VolumeTiming`` entries), and
an event that now falls before the first volume is kept with its negative onset (not
dropped: the BIDS rule keeps it, and a model may still need the response it set off).

Which table applies follows the inheritance principle, as for sidecars: an
``*_events.tsv`` in a folder from the dataset root down to the run's own, whose
entities are all among the run's (same values); the deepest folder that holds one
wins. BIDS allows no more than one applicable file per folder level: two are
ambiguous, and none is used.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from decimal import Decimal, InvalidOperation
from pathlib import Path

from .entities import parse_name
from .errors import ReadError, open_regular, read_bounded
from .inheritance import folder_chain

__all__ = [
    "EVENTS_ENTITIES",
    "MAX_EVENTS_BYTES",
    "ShiftedEvents",
    "events_name",
    "find_events",
    "read_events",
    "shift_onsets",
]

#: the entities an MRI events file may carry (BIDS schema, rules.files.raw.events.
#: events__mri), in the order BIDS writes them; a derivative adds ``desc``
EVENTS_ENTITIES = ("sub", "ses", "task", "acq", "ce", "rec", "dir", "run")
#: an events table larger than this is not read (a design has thousands of rows, not
#: millions)
MAX_EVENTS_BYTES = 16 << 20


def find_events(root: Path, run: Path) -> Path | None:
    """The events table that applies to the run image ``run`` under dataset ``root``,
    or None; ValueError naming both files when two apply at one folder level."""
    parsed = parse_name(run.name)
    if parsed is None:
        return None
    entities = parsed.entities
    # the folders from the root down to the run's, as for sidecars (deepest first here)
    chain = folder_chain(os.fspath(run.parent), os.fspath(root))
    for where in map(Path, reversed(chain)):
        try:
            names = sorted(e.name for e in os.scandir(where)
                           if e.name.endswith("_events.tsv") and not e.name.startswith("."))
        except OSError:
            continue
        found: list[str] = []
        for name in names:
            table = parse_name(name)
            if table is None or table.suffix != "events" or table.extension != ".tsv":
                continue
            if all(entities.get(k) == v for k, v in table.entities.items()):
                found.append(name)
        if len(found) > 1:
            raise ValueError(f"two events tables apply at one level ({found[0]} and "
                             f"{found[1]} in {where}); BIDS allows one")
        if found:
            return where / found[0]
    return None


def read_events(path: Path, root: Path, shown: str) -> str:
    """The text of an events table: a regular file inside the dataset (a link out of
    it is not read), at most :data:`MAX_EVENTS_BYTES`, UTF-8. Raises ReadError."""
    fh, st = open_regular(path, shown, what="events table", root=root)
    with fh:
        raw = read_bounded(fh, st.st_size, MAX_EVENTS_BYTES)
    if len(raw) > MAX_EVENTS_BYTES:
        raise ReadError("file/unreadable", shown, None,
                        f"{shown}: larger than {MAX_EVENTS_BYTES} bytes; not read")
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise ReadError("file/unreadable", shown, None,
                        f"{shown}: not UTF-8 text (byte {exc.start})") from None


@dataclass(frozen=True)
class ShiftedEvents:
    """An events table restated for a later first volume."""

    text: str
    shift: Decimal  # seconds subtracted from every onset
    before_first: int  # events whose onset is now negative (kept)
    events: int  # rows with an onset


def shift_onsets(text: str, shift: Decimal, shown: str) -> ShiftedEvents:
    """``text`` (an events table) with ``shift`` seconds subtracted from every onset,
    exactly in decimal (``12.5`` less ``3`` is ``9.5``, never ``9.499999``), every
    other byte kept; ``n/a`` onsets stay ``n/a``. ValueError naming the line for a
    table without an ``onset`` column or an onset that is not a number."""
    lines = text.splitlines(keepends=True)
    if not lines:
        raise ValueError(f"{shown}: empty; an events table starts with a header line")
    columns = lines[0].rstrip("\r\n").split("\t")
    if "onset" not in columns:
        raise ValueError(f"{shown}: line 1 has no onset column (BIDS requires onset first)")
    at = columns.index("onset")
    out = [lines[0]]
    before = rows = 0
    for number, line in enumerate(lines[1:], 2):
        body = line.rstrip("\r\n")
        if not body.strip():
            out.append(line)
            continue
        cells = body.split("\t")
        if at >= len(cells):
            raise ValueError(f"{shown}: line {number} has no onset value")
        value = cells[at].strip()
        if value != "n/a":
            try:
                onset = Decimal(value)
            except InvalidOperation:
                raise ValueError(f"{shown}: line {number}: onset {value!r} is not a number "
                                 "of seconds") from None
            if not onset.is_finite():
                raise ValueError(f"{shown}: line {number}: onset {value!r} is not finite")
            moved = onset - shift
            before += moved < 0
            rows += 1
            cells[at] = _decimal_text(moved)
        out.append("\t".join(cells) + line[len(body):])
    return ShiftedEvents("".join(out), shift, before, rows)


def _decimal_text(value: Decimal) -> str:
    """A decimal in plain notation without trailing zeros beyond one decimal place
    (``9.50`` → ``9.5``, ``4`` → ``4.0``, never ``4E+1``)."""
    text = format(value.normalize(), "f")
    if "." not in text:
        text += ".0"
    return "0.0" if text in ("-0.0", "-0") else text


def events_name(image_name: str) -> str:
    """The events table beside a derivative image: the image's entities an MRI events
    file may carry, and its ``desc`` (``sub-01_task-x_echo-2_desc-a_bold.nii.gz`` →
    ``sub-01_task-x_desc-a_events.tsv``; echoes of one run share it)."""
    parsed = parse_name(image_name)
    if parsed is None:
        raise ValueError(f"{image_name}: not a BIDS name")
    kept = [f"{k}-{v}" for k, v in parsed.entities.items() if k in (*EVENTS_ENTITIES, "desc")]
    return "_".join([*kept, "events"]) + ".tsv"
