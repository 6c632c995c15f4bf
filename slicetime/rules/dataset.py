"""Checks across runs: consensus within a task/acquisition, echoes, overrides."""

from __future__ import annotations

from collections import Counter, defaultdict
from collections.abc import Callable, Hashable, Iterator, Sequence
from typing import Any

from slicetime.model import TIME_TOLERANCE, RunRecord, RunView, Severity
from slicetime.numbers import secs
from slicetime.rules.registry import DatasetHit, Hit

E = Severity.ERROR

#: entities that name a protocol; runs sharing them are expected to share timing.
#: echo and part are left out: echoes and magnitude/phase parts of one run share a
#: protocol by construction and are compared by dataset/echo-mismatch.
PROTOCOL_ENTITIES = ("task", "acq", "ce", "rec", "dir")
#: a consensus needs at least this many runs (common practice, no source)
MIN_RUNS_FOR_CONSENSUS = 3


def protocol_key(record: RunView) -> tuple[str, ...]:
    """Runs with the same key (root, datatype, suffix, protocol entities) should agree."""
    return (record.root, record.datatype or "", record.suffix,
            *(f"{e}-{record.entities.get(e, '')}" for e in PROTOCOL_ENTITIES))


def _describe_key(key: tuple[str, ...]) -> str:
    parts = [p for p in key[3:] if not p.endswith("-")]
    return "_".join([*parts, key[2]]) if parts else key[2]


def _consensus(
    records: Sequence[RunView],
    value_of: Callable[[RunView], Hashable | None],
    show: Callable[[Hashable], str],
    what: str,
    field: str | Callable[[RunView, Sequence[RunView]], str],
) -> Iterator[DatasetHit]:
    """Outliers against a strict majority of a protocol's runs. ``field`` names the
    field the finding is about, or says it for an outlier given the majority's runs."""
    groups: dict[tuple[str, ...], list[RunView]] = defaultdict(list)
    for record in records:
        if record.header is not None or record.content_missing is not None:
            groups[protocol_key(record)].append(record)
    for key, members in sorted(groups.items()):
        values = [(r, value_of(r)) for r in members]
        known = [(r, v) for r, v in values if v is not None]
        if len(known) < MIN_RUNS_FOR_CONSENSUS:
            continue
        counts = Counter(v for _, v in known)
        majority, votes = counts.most_common(1)[0]
        if votes * 2 <= len(known) or votes == len(known):
            continue  # no strict majority, or everyone agrees
        outliers = [r for r, v in known if v != majority]
        agreeing = [r for r, v in known if v == majority] if callable(field) else []
        for record in outliers:
            seen = value_of(record)
            assert seen is not None
            yield DatasetHit(record.abs_path, Hit(
                f"{what} {show(seen)} differs from the {votes} of {len(known)} "
                f"{_describe_key(key)} runs that have {show(majority)}",
                field(record, agreeing) if callable(field) else field,
                {"found": show(seen), "majority": show(majority), "majority_runs": votes,
                 "runs_compared": len(known),
                 "outliers": [r.path for r in outliers][:20]},
            ))


def _scheme_value(record: RunView) -> Hashable | None:
    if record.scheme is None:
        return None
    return (record.scheme.label, record.scheme.groups) if not record.scheme.regular \
        else record.scheme.label


def _scheme_text(value: Hashable) -> str:
    return f"'{value[0]}'" if isinstance(value, tuple) else f"'{value}'"


def outlier_scheme(records: Sequence[RunView]) -> Iterator[DatasetHit]:
    yield from _consensus(records, _scheme_value, _scheme_text, "scheme", _scheme_field)


def _scheme_field(record: RunView, majority: Sequence[RunView]) -> str:
    """The field an outlying scheme comes from: SliceEncodingDirection when the run
    reads the very SliceTiming the majority reads (the same sidecar) but takes its
    direction from elsewhere, so the finding names the run's own value and file,
    not the shared list the agreeing runs use; else SliceTiming."""
    sources = record.metadata_sources
    times_from, direction_from = sources.get("SliceTiming"), sources.get("SliceEncodingDirection")
    if times_from is None or direction_from is None or direction_from == times_from:
        return "SliceTiming"
    if any(r.metadata_sources.get("SliceTiming") == times_from
           and r.metadata_sources.get("SliceEncodingDirection") != direction_from
           for r in majority):
        return "SliceEncodingDirection"
    return "SliceTiming"


def outlier_tr(records: Sequence[RunView]) -> Iterator[DatasetHit]:
    def value(record: RunView) -> Hashable | None:
        tr = record.timing.repetition_time  # seconds, with or without slice times
        return round(tr, 3) if tr else None

    yield from _consensus(records, value,
                          lambda v: secs(v) if isinstance(v, int | float) else str(v),
                          "RepetitionTime",
                          "RepetitionTime")


def outlier_slices(records: Sequence[RunView]) -> Iterator[DatasetHit]:
    def value(record: RunView) -> Hashable | None:
        if record.schedule is not None:
            return record.schedule.n_slices
        return record.axis_length

    yield from _consensus(records, value, lambda v: f"{v}", "slice count", "SliceTiming")


def _run_stem(path: str) -> str | None:
    lower = path.lower()
    for ext in (".nii.gz", ".nii"):
        if lower.endswith(ext):
            return path[: -len(ext)]
    return None


def duplicate_run(records: Sequence[RunView]) -> Iterator[DatasetHit]:
    copies: dict[tuple[str, str], list[RunView]] = defaultdict(list)
    for record in records:
        stem = _run_stem(record.path)
        if stem is not None:
            copies[(record.root, stem)].append(record)
    for _, same in sorted(copies.items()):
        if len(same) < 2:
            continue
        names = sorted(r.path.rsplit("/", 1)[-1] for r in same)
        for record in sorted(same, key=lambda r: r.path):
            others = [n for n in names if n != record.path.rsplit("/", 1)[-1]]
            yield DatasetHit(record.abs_path, Hit(
                f"{record.path.rsplit('/', 1)[-1]} and {', '.join(others)} are copies of one "
                "run (the same name with both NIfTI extensions)",
                evidence={"copies": [r.path for r in sorted(same, key=lambda r: r.path)]},
                file=record.path))


def _echo_family(record: RunView) -> tuple[Any, ...] | None:
    if "echo" not in record.entities and "part" not in record.entities:
        return None
    rest = tuple(sorted((k, v) for k, v in record.entities.items() if k not in ("echo", "part")))
    return (record.root, record.datatype, record.suffix, rest)


def echo_mismatch(records: Sequence[RunView]) -> Iterator[DatasetHit]:
    """Each echo/part that disagrees with the timing most of its family shares; when no
    timing is shared by a strict majority (two echoes that differ), every member is in
    doubt, since nothing tells which one is right."""
    families: dict[tuple[Any, ...], list[RunView]] = defaultdict(list)
    for record in records:
        family = _echo_family(record)
        if family is not None and record.schedule is not None:
            families[family].append(record)
    for members in families.values():
        if len(members) < 2:
            continue
        clusters: list[list[RunView]] = []
        for record in sorted(members, key=lambda r: r.path):
            home = next((c for c in clusters if _same_timing(c[0], record) is None), None)
            if home is None:
                clusters.append([record])
            else:
                home.append(record)
        if len(clusters) < 2:
            continue
        largest = max(clusters, key=len)
        majority = largest if len(largest) * 2 > len(members) else None
        for cluster in clusters:
            if cluster is majority:
                continue
            for other in cluster:
                first = majority[0] if majority is not None else next(
                    c[0] for c in clusters if c is not cluster)
                what = _same_timing(first, other)
                assert first.schedule is not None and other.schedule is not None
                why = "" if majority is not None else (
                    f"; no timing is shared by most of the {len(members)} echoes/parts, so "
                    "none of them can be trusted over the others")
                yield DatasetHit(other.abs_path, Hit(
                    f"{what} differs from {first.path}, another echo/part of the same run{why}",
                    what,
                    {"reference_run": first.path,
                     "reference_scheme": first.scheme.label if first.scheme else None,
                     "this_scheme": other.scheme.label if other.scheme else None,
                     "reference_tr": first.schedule.repetition_time,
                     "this_tr": other.schedule.repetition_time,
                     "members": len(members),
                     "agreeing_with_reference": len(majority) if majority is not None else 1},
                ))


def _same_timing(first: RunView, other: RunView) -> str | None:
    """The field in which two echoes' timing differs (SliceTiming first), or None."""
    a, b = first.schedule, other.schedule
    assert a is not None and b is not None
    same_times = len(a.times) == len(b.times) and all(
        abs(x - y) <= TIME_TOLERANCE for x, y in zip(a.times, b.times, strict=True))
    if not same_times:
        return "SliceTiming"
    same_tr = (a.repetition_time is None) == (b.repetition_time is None) and (
        a.repetition_time is None or b.repetition_time is None
        or abs(a.repetition_time - b.repetition_time) <= TIME_TOLERANCE)
    return None if same_tr else "RepetitionTime"


def timing_override(record: RunRecord) -> Iterator[Hit]:
    for key, shadowed in sorted(record.overridden.items()):
        winner = record.metadata_sources.get(key)
        replaced_from, replaced = shadowed[-1]
        broken = key == "SliceTiming" and (
            bool(record.timing_problems) or _exceeds_window(record))
        yield Hit(
            f"{key} from {winner} overrides the value inherited from {replaced_from}"
            + (" and the overriding value is broken" if broken else ""),
            key,
            {"winner": winner, "overridden": [s for s, _ in shadowed],
             "inherited_value": _short(replaced)},
            severity=E if broken else None,
        )


def _exceeds_window(record: RunRecord) -> bool:
    """The resolved verdict: times in the wrong unit, or slices outside the window."""
    timing = record.timing
    return bool(timing.outside) or timing.unit("SliceTiming") != "s"


def _short(value: Any) -> Any:
    if isinstance(value, list) and len(value) > 12:
        return [*value[:12], f"… {len(value) - 12} more"]
    return value
