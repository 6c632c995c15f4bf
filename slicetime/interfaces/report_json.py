"""The JSON report (contract in DESIGN.md) and its shipped JSON Schema."""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from functools import lru_cache
from typing import TYPE_CHECKING, Any

from slicetime import __version__
from slicetime.codes import package_data
from slicetime.escapes import json_safe
from slicetime.numbers import json_time, json_times, tidy_json
from slicetime.pipelines.audit import AuditResult, RunResult
from slicetime.words import encoding_direction

if TYPE_CHECKING:  # the correct and verify pipelines import numpy: only for types here
    from slicetime.pipelines.correct import CorrectResult, RunOutcome
    from slicetime.pipelines.verify import VerifyOutcome


@lru_cache(maxsize=1)
def report_schema() -> dict[str, Any]:
    return json.loads(package_data("report.schema.json"))


@lru_cache(maxsize=1)
def lines_schema() -> dict[str, Any]:
    """The schema of each line of ``audit --format jsonl`` (it refers to
    ``report.schema.json``; see :func:`lines_validator`)."""
    return json.loads(package_data("report-lines.schema.json"))


def lines_validator() -> Any:
    """A jsonschema validator for one jsonl line, with the report schema it refers to."""
    import jsonschema
    from referencing import Registry, Resource

    registry = Registry().with_resources([
        ("slicetime/report.schema.json", Resource.from_contents(report_schema())),
    ])
    return jsonschema.Draft202012Validator(lines_schema(), registry=registry)


def run_object(run: RunResult) -> dict[str, Any]:
    """One run as the contract's run object."""
    head, origin, tail = run_parts(run)
    record = run.record
    schedule = record.schedule
    return {
        **head,
        "slice_times": json_times(schedule.times) if schedule else None,
        "timing_origin": origin,
        "scheme": record.scheme.to_json() if record.scheme else None,
        **tail,
    }


def run_parts(run: RunResult) -> tuple[dict[str, Any], str | None, dict[str, Any]]:
    """The run object without the values many runs share (``slice_times`` and
    ``scheme``): the keys before ``slice_times``, the ``timing_origin`` between them,
    and the keys after ``scheme``. :func:`run_object` puts them together; the streamed
    report encodes the shared values once per distinct value (``report_source.run_line``)."""
    record = run.record
    schedule = record.schedule
    header = record.header
    sources: dict[str, str] = {}
    if schedule is not None:
        sources.update({k: v.describe() for k, v in schedule.sources.items()})
    elif record.timing.repetition_source is not None:  # a TR without slice times
        sources["RepetitionTime"] = record.timing.repetition_source.describe()
    for key in ("MultibandAccelerationFactor", "TaskName", "EchoTime"):
        if key in record.metadata_sources:
            sources[key] = record.metadata_sources[key]
    head = {
        "path": record.path,
        "shape": list(header.shape) if header else None,
        "slice_axis": schedule.axis if schedule else None,
        "slice_direction": schedule.direction if schedule else None,
        "slice_encoding_direction": encoding_direction(schedule.axis, schedule.direction)
        if schedule else None,
        "repetition_time": _time(record.timing.repetition_time),  # seconds, resolved
        # what gave it: "sidecar", or "header" when no sidecar gives a usable TR
        "repetition_time_source": record.timing.repetition_origin,
        "volume_times": json_times(schedule.volume_times) if schedule and schedule.volume_times
        else None,
        "acquisition_duration": _time(schedule.acquisition_duration) if schedule else None,
    }
    tail = {
        "sources": sources,
        "entities": dict(record.entities),
        "sidecars": list(record.sidecar_chain),
        "findings": [f.to_json() for f in run.findings],
    }
    return head, record.timing_origin, tail


def _time(value: float | None) -> float | None:
    return None if value is None else json_time(value)


def audit_object(result: AuditResult, root_given: str) -> dict[str, Any]:
    """The whole report as one object: what ``report_stream.write_json`` writes (the
    one writer of the JSON report), parsed. ``root`` names the dataset(s): see
    ``report_root``."""
    import io

    from slicetime.interfaces.report_source import MemorySource
    from slicetime.interfaces.report_stream import write_json

    buffer = io.StringIO()
    write_json(MemorySource(result, root_given), buffer)
    report: dict[str, Any] = json.loads(buffer.getvalue())
    return report


def correct_run_object(outcome: RunOutcome) -> dict[str, Any]:
    """One run of ``correct --format json`` (``correct.schema.json``, ``runs`` item)."""
    return tidy_json({  # no float noise
        "path": outcome.path,
        "status": outcome.status,
        "reason": outcome.reason,
        "output": outcome.output,
        "reference_time": outcome.reference,
        "warnings": list(outcome.warnings),
        "blocking_findings": [f.to_json() for f in outcome.blocking],
        "removed_output": outcome.removed,
        "slice_time_ref": outcome.slice_time_ref,
        "accepted_doubts": [dict(a) for a in outcome.accepted],
        "seconds": round(outcome.seconds, 3),
    })


def correct_object(result: CorrectResult) -> dict[str, Any]:
    """The document ``correct --format json`` prints (``correct.schema.json``)."""
    return {
        "tool": {"name": "slicetime", "version": __version__},
        "out": result.out,
        "runs": [correct_run_object(r) for r in result.runs],
        "batch_findings": [f.to_json() for f in result.batch_findings()],
        "summary": result.counts(),
        "hand_off": result.hand_off(),
    }


#: the verdicts of ``verify``, in the order its summary lists them
VERDICTS = ("supported", "consistent", "contradicted", "undecidable")


def verdict_of(outcome: VerifyOutcome) -> str:
    """The verdict of one verified run: the short name of its ``verify/*`` code."""
    return outcome.finding.code.split("/")[1]


def verify_object(outcomes: Sequence[VerifyOutcome],
                  unreadable: Sequence[Mapping[str, str]]) -> dict[str, Any]:
    """The document ``verify --format json`` prints (``verify.schema.json``):
    ``unreadable`` lists the files that could not be read (file, code, message)."""
    verdicts = [verdict_of(o) for o in outcomes]
    return {
        "tool": {"name": "slicetime", "version": __version__},
        "runs": [{"path": o.path, "verdict": verdict_of(o), "finding": o.finding.to_json()}
                 for o in outcomes],
        "unreadable": [dict(u) for u in unreadable],
        "summary": {v: verdicts.count(v) for v in VERDICTS},
    }


def dumps(obj: Any) -> str:
    return json.dumps(json_safe(obj), indent=2, ensure_ascii=False, allow_nan=False)
