"""The ``fix --consolidate/--spread`` layout moves: a field written once in the
top-level sidecar of a task and acquisition instead of in every run's own sidecar,
or the reverse.

A move is a :class:`~slicetime.rules.repairs.Repair` of code ``layout/consolidate``
or ``layout/spread`` placed in a named file; :mod:`slicetime.pipelines.fix` builds
the files' new text with the repairs and applies them in the same transaction.
"""

from __future__ import annotations

import difflib
import json
from collections import defaultdict
from collections.abc import Sequence
from typing import Any

from slicetime.model import Finding, RunRecord
from slicetime.readers.entities import parse_name, sidecar_path
from slicetime.readers.sidecar import TIMING_FIELDS
from slicetime.rules.dataset import PROTOCOL_ENTITIES
from slicetime.rules.repairs import Repair


class _Remove:
    """The value of a repair that deletes its field."""

    def __repr__(self) -> str:
        return "REMOVE"


REMOVE: Any = _Remove()


def value_key(value: Any) -> str:
    return "<remove>" if value is REMOVE else json.dumps(value, sort_keys=True)


def _top_name(record: RunRecord) -> str:
    """The root-level sidecar for the run's task and acquisition: ``task-x[_acq-y]_bold.json``."""
    parts = [f"{e}-{record.entities[e]}" for e in PROTOCOL_ENTITIES if e in record.entities]
    return "_".join([*parts, record.suffix]) + ".json"


def _applies(top: str, record: RunRecord) -> bool:
    parsed = parse_name(top)
    return parsed is not None and parsed.suffix == record.suffix and all(
        record.entities.get(k) == v for k, v in parsed.entities.items()
    )


def _move(record: RunRecord, key: str, value: Any, code: str, source: str) -> Repair:
    return Repair(run=record.path, root=record.root, code=code, field=key, value=value,
                  current=record.metadata.get(key),
                  resolved_from=record.metadata_sources.get(key), source=source)


def layout_moves(
    runs: Sequence[tuple[RunRecord, list[Finding]]],
    wanted: set[tuple[str, str]],
    consolidate: Sequence[str],
    spread: Sequence[str],
    notes: list[str],
) -> list[tuple[str, Repair]]:
    """(file, repair) pairs that move fields between run and top-level sidecars; a move
    not made is said in ``notes`` (the plan's)."""
    records = [r for r, _ in runs if r.header is not None]
    users: dict[tuple[str, str, str], list[RunRecord]] = defaultdict(list)
    for record in records:
        for name, source in record.metadata_sources.items():
            users[(record.root, source, name)].append(record)
    moves: list[tuple[str, Repair]] = []
    for key in consolidate:
        groups: dict[tuple[str, str], list[RunRecord]] = defaultdict(list)
        for record in records:
            if (record.root, record.path) in wanted and record.suffix:
                groups[(record.root, _top_name(record))].append(record)
        for (root, top), members in sorted(groups.items()):
            affected = [r for r in records if r.root == root and _applies(top, r)]
            values = {value_key(r.metadata.get(key)) for r in affected}
            if len(affected) < 2 or len(values) != 1 or key not in affected[0].metadata:
                notes.append(f"{top}: {key} not consolidated: the {len(affected)} runs "
                                  "it would serve do not all have one value")
                continue
            if all(r.metadata_sources.get(key) == top for r in affected):
                continue  # already written once
            sources = {r.metadata_sources[key] for r in affected} - {top}
            outside = [s for s in sorted(sources)
                       if not {u.path for u in users[(root, s, key)]} <= {a.path for a in affected}]
            if outside:
                notes.append(f"{top}: {key} not consolidated: {outside[0]} also gives it "
                                  "to runs of other tasks or acquisitions")
                continue
            value = affected[0].metadata[key]
            why = f"one value shared by the {len(affected)} runs {top} serves"
            moves.append((top, _move(members[0], key, value, "layout/consolidate", why)))
            for record in affected:
                origin = record.metadata_sources.get(key)
                if origin is not None and origin != top:
                    moves.append((origin, _move(record, key, REMOVE, "layout/consolidate",
                                                f"now inherited from {top}")))
    for key in spread:
        for record in records:
            origin = record.metadata_sources.get(key)
            own = sidecar_path(record.path)
            if (record.root, record.path) not in wanted or origin is None or origin == own:
                continue
            if not all((u.root, u.path) in wanted for u in users[(record.root, origin, key)]):
                note = (f"{origin}: {key} not spread: it also serves runs outside the paths "
                        "given (give the whole dataset)")
                if note not in notes:
                    notes.append(note)
                continue
            value = record.metadata[key]
            moves.append((own, _move(record, key, value, "layout/spread",
                                     f"copied from {origin} into the run's own sidecar")))
            moves.append((origin, _move(record, key, REMOVE, "layout/spread",
                                        "now written in each run's own sidecar")))
    return moves


def check_fields(
    runs: Sequence[tuple[RunRecord, list[Finding]]],
    consolidate: Sequence[str],
    spread: Sequence[str],
) -> str | None:
    """What is wrong with a --consolidate/--spread field that no run has and BIDS timing
    lacks (None: every field asked for is known)."""
    asked = [("--consolidate", k) for k in consolidate] + [("--spread", k) for k in spread]
    if not asked:
        return None
    known = set(TIMING_FIELDS)
    for record, _ in runs:
        known.update(record.metadata)
    for option, key in asked:
        if key not in known:
            close = difflib.get_close_matches(key, sorted(known), n=1, cutoff=0.6)
            guess = f"; did you mean {close[0]!r}?" if close else ""
            return (f"{option} {key!r}: no run in the dataset has this field and it is "
                    f"not a known timing field{guess}")
    return None
