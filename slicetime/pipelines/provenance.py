"""Provenance of corrected runs: the output sidecar's record, the derivative
dataset's ``dataset_description.json`` and ``slicetime-provenance.json``.

An output sidecar records the run's true inputs (dataset URI, image and
sidecars with their SHA-256), the settings and the output's SHA-256: it is the
"done" marker an output is reused by, and the provenance file is rebuilt from
the sidecars that are on disk.
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol

from slicetime import __version__
from slicetime.engines.interpolate import Engine, ResampleStats
from slicetime.engines.plan import ResamplingPlan, slice_time_ref, window_fields
from slicetime.escapes import json_safe, unescaped
from slicetime.model import RunRecord
from slicetime.pipelines.outputs import output_files
from slicetime.readers.atomic import write_atomic
from slicetime.readers.errors import ReadError, is_regular_file, open_regular, read_bounded
from slicetime.readers.volumes import file_sha256

PROVENANCE_KEY = "SliceTimeAlignment"
PROVENANCE_FILE = "slicetime-provenance.json"
#: fields dropped from the output sidecar: they describe per-slice offsets that no
#: longer exist in the corrected image
DROPPED_FIELDS = ("SliceTiming",)


class Outcome(Protocol):
    """What the provenance file needs of a run's outcome."""

    @property
    def ok(self) -> bool: ...

    output: str | None
    removed: str | None
    reason: str | None
    provenance: dict[str, Any] | None


def write_json_atomic(path: Path, content: Any) -> None:
    """``content`` as indented JSON at ``path``, atomically (its temporary name is the
    one :func:`remove_stale_temporaries` recognises after a crash)."""
    text = json.dumps(json_safe(content), indent=2, ensure_ascii=False, allow_nan=False)
    write_atomic(path, text + "\n")


def dataset_uri(root: str | Path) -> str:
    """How outputs and ``DatasetLinks`` name an input dataset: its resolved file URI."""
    return Path(os.path.realpath(root)).as_uri()


def hash_inputs(record: RunRecord, image_sha: str | None) -> dict[str, Any]:
    """The run's true inputs: its dataset (file URI), image and sidecars with their
    SHA-256, as written in the output (text made JSON-safe)."""
    root = Path(record.root)
    sidecars = []
    for rel in record.sidecar_chain:
        sidecars.append({"Path": rel, "SHA256": file_sha256(root / rel)})
    image = {"Path": record.path, "SHA256": image_sha or file_sha256(Path(record.abs_path))}
    return json_safe({"Dataset": dataset_uri(root), "Image": image, "Sidecars": sidecars})


def pascal_keys(mapping: Mapping[str, Any]) -> dict[str, Any]:
    """Our own keys in the files we write are PascalCase like the BIDS fields beside them
    (``half_width`` → ``HalfWidth``); values are kept."""
    return {"".join(part[:1].upper() + part[1:] for part in key.split("_")): value
            for key, value in mapping.items()}


def _current_settings(recorded: Any) -> Any:
    """Settings recorded by an earlier release (lower-case ``Parameters`` and
    ``Reference`` keys), spelled as they are written now, so the rename alone never
    makes an output look out of date."""
    if not isinstance(recorded, dict):
        return recorded
    current = dict(recorded)
    for key in ("Parameters", "Reference"):
        if isinstance(current.get(key), dict):
            current[key] = pascal_keys(current[key])
    return current


def up_to_date(
    image_out: Path, sidecar_out: Path, settings: dict[str, Any], inputs: dict[str, Any]
) -> bool:
    content = read_json_object(sidecar_out)
    recorded = content.get(PROVENANCE_KEY, {}) if content is not None else None
    if not isinstance(recorded, dict):
        return False
    if _current_settings(recorded.get("Settings")) != settings \
            or recorded.get("Inputs") != inputs:
        return False
    output = recorded.get("Output", {})
    if not is_regular_file(image_out) or not isinstance(output, dict):
        return False
    return output.get("SHA256") == file_sha256(image_out)


@dataclass(frozen=True)
class CorrectionFacts:
    """What the correction of one run decided, beside its plan, for its output sidecar."""

    #: the doubts about the timing accepted (code, message, accepted_by, reason)
    accepted: Sequence[Mapping[str, str]] = ()
    #: leading volumes left out of the output
    omitted: int = 0
    #: the variance white noise keeps in each slice (data-array order)
    noise: Sequence[float] = ()
    #: the run's events table restated beside the output (``--omit-leading``), if any
    events: Mapping[str, Any] | None = None


def output_sidecar(
    record: RunRecord,
    plan: ResamplingPlan,
    settings: dict[str, Any],
    inputs: dict[str, Any],
    output_sha: str,
    dataset_name: str,
    stats: ResampleStats,
    facts: CorrectionFacts | None = None,
) -> dict[str, Any]:
    """The output sidecar: the input's metadata without ``SliceTiming`` (a deprecated
    ``AcquisitionDuration`` beside ``VolumeTiming`` renamed ``FrameAcquisitionDuration``), the
    fields that keep the acquisition window (``engines.plan.window_fields``), the leading
    volumes left out (``NumberOfVolumesDiscardedByUser``, ``VolumeTiming`` cut to the volumes
    kept), the derivative fields (``SliceTimingCorrected``, ``StartTime``, ``Sources``) and the
    provenance record."""
    facts = facts if facts is not None else CorrectionFacts()
    metadata = {k: v for k, v in record.metadata.items() if k not in DROPPED_FIELDS}
    schedule = record.schedule
    assert schedule is not None
    if "VolumeTiming" in metadata and "AcquisitionDuration" in metadata:
        # BIDS (schema rules.checks.func.DeprecatedAcquisitionDuration): beside
        # VolumeTiming the time each volume takes is FrameAcquisitionDuration, and
        # AcquisitionDuration there is deprecated; the output says it the current way
        duration = metadata.pop("AcquisitionDuration")
        metadata.setdefault("FrameAcquisitionDuration", duration)
    metadata.update(window_fields(schedule, frozenset(metadata)))
    if facts.omitted:
        prior = metadata.get("NumberOfVolumesDiscardedByUser")
        before = prior if isinstance(prior, int) and not isinstance(prior, bool) else 0
        metadata["NumberOfVolumesDiscardedByUser"] = max(0, before) + facts.omitted
        times = schedule.volume_times
        if times is not None and "VolumeTiming" in metadata:
            # the first volume kept takes the first volume's time (BIDS: times count
            # from the first volume stored)
            offset = times[facts.omitted] - times[0]
            metadata["VolumeTiming"] = [round(t - offset, 6) for t in times[facts.omitted:]]
    metadata["SliceTimingCorrected"] = True
    metadata["StartTime"] = round(plan.reference, 6)
    metadata["Sources"] = [f"bids:{dataset_name}:{record.path}"]
    metadata[PROVENANCE_KEY] = {
        "Tool": {"Name": "slicetime", "Version": __version__},
        "Settings": settings,
        "ReferenceTime": round(plan.reference, 6),
        "OriginalSliceTiming": [round(t, 6) for t in schedule.sidecar_order()],
        "SliceEncodingDirection": schedule.axis + ("-" if schedule.direction == "-" else ""),
        "SliceAxis": schedule.axis,
        "SliceDirection": schedule.direction,
        "TimingOrigin": record.timing_origin,
        "LargestShift": round(plan.max_shift, 6),
        "WhiteNoiseVarianceRatio": list(facts.noise),
        "SliceTimeRef": slice_time_ref(plan.reference, schedule.repetition_time),
        "LeadingVolumesLeftOut": facts.omitted,
        "AcceptedDoubts": [pascal_keys(a) for a in facts.accepted],
        **({"Events": dict(facts.events)} if facts.events is not None else {}),
        "ConstantSeries": stats.constant,
        "SeriesWithGaps": stats.partial_nonfinite,
        "Inputs": inputs,
        "Output": {"SHA256": output_sha},
    }
    return metadata


def read_description(root: Path) -> dict[str, Any]:
    return read_json_object(root / "dataset_description.json") or {}


def dataset_names(
    out: Path, roots: Sequence[str], *, mix_inputs: bool
) -> tuple[dict[str, str], dict[str, str]]:
    """``(name of each root, DatasetLinks to write)``.

    An ``out`` that slicetime wrote before keeps its links and names (so the
    ``Sources`` of earlier outputs stay true); a root it does not link to is
    refused unless ``mix_inputs``, then added under a name not yet used. A folder
    that holds a dataset slicetime did not write is always refused.
    """
    path = out / "dataset_description.json"
    links: dict[str, str] = {}
    if path.exists():
        content = read_description(out)
        generated = content.get("GeneratedBy")
        names = (
            {g.get("Name") for g in generated if isinstance(g, dict)}
            if isinstance(generated, list)
            else set()
        )
        if "slicetime" not in names:
            raise ValueError(
                f"--out {out} already holds a dataset that slicetime did not write "
                f"({path.name} has no GeneratedBy entry for slicetime); choose an empty folder"
            )
        found = content.get("DatasetLinks")
        if isinstance(found, dict):
            links = {str(k): str(v) for k, v in found.items() if isinstance(v, str)}
    by_uri = {uri: name for name, uri in links.items()}
    others = [root for root in roots if dataset_uri(root) not in by_uri]
    if links and others and not mix_inputs:
        raise ValueError(
            f"--out {out} holds outputs made from {', '.join(sorted(links.values()))}, not "
            f"from {others[0]}; choose another folder, or pass --mix-inputs to add this "
            "dataset's runs beside them"
        )
    result: dict[str, str] = {}
    for root in roots:
        uri = dataset_uri(root)
        if uri not in by_uri:
            number = len(links) + 1
            while (name := "raw" if number == 1 else f"raw{number}") in links:
                number += 1
            links[name] = uri
            by_uri[uri] = name
        result[root] = by_uri[uri]
    return result, links


def write_description(
    out: Path, roots: Sequence[str], links: dict[str, str], engine: Engine, reference: str
) -> None:
    """Write the derivative dataset's description (``reference``: the reference rule
    in words)."""
    first = read_description(Path(roots[0])) if roots else {}
    bids_version = first.get("BIDSVersion") if isinstance(first.get("BIDSVersion"), str) else None
    description = {
        "Name": "Slice-timing corrected runs (slicetime)",
        "BIDSVersion": bids_version or "1.10.0",
        "DatasetType": "derivative",
        "GeneratedBy": [
            {
                "Name": "slicetime",
                "Version": __version__,
                "Description": (
                    f"Slice-timing correction with the {engine.name} method "
                    f"({engine.summary}); reference {reference}; "
                    f"parameters {json.dumps(dict(engine.parameters), sort_keys=True)}"
                ),
            }
        ],
        "DatasetLinks": dict(sorted(links.items())),
    }
    write_json_atomic(out / "dataset_description.json", description)


def entry_of(sidecar: dict[str, Any], output: str) -> dict[str, Any] | None:
    """The provenance file's entry for one output, from its sidecar: every field of
    the sidecar's provenance, its ``Sources`` and ``OutputPath`` (the same for a run
    corrected now and one corrected by an earlier, possibly killed, batch)."""
    recorded = sidecar.get(PROVENANCE_KEY)
    if not isinstance(recorded, dict):
        return None
    return {**recorded, "Sources": sidecar.get("Sources"), "OutputPath": output}


#: the largest JSON file (description, output sidecar, provenance) read back
MAX_JSON_BYTES = 64 << 20


def read_json_object(path: Path) -> dict[str, Any] | None:
    """The JSON object in the regular file ``path`` (read with a bound, so a FIFO or a
    device put in its place never blocks), or None when there is none."""
    try:
        fh, st = open_regular(path, str(path))
        with fh:
            raw = read_bounded(fh, st.st_size, MAX_JSON_BYTES)
        value = json.loads(raw) if len(raw) <= MAX_JSON_BYTES else None
        return value if isinstance(value, dict) else None
    except (OSError, ValueError, RecursionError, ReadError):
        return None


def provenance_entry(sidecar_out: Path, output: str) -> dict[str, Any] | None:
    content = read_json_object(sidecar_out)
    return entry_of(content, output) if content is not None else None


def recorded_input(sidecar_out: Path) -> tuple[str, str] | None:
    """``(dataset URI, image path)`` an existing output sidecar records as its input
    (None: no such sidecar, or not one slicetime wrote with its dataset)."""
    content = read_json_object(sidecar_out)
    recorded = content.get(PROVENANCE_KEY) if content else None
    inputs = recorded.get("Inputs") if isinstance(recorded, dict) else None
    if not isinstance(inputs, dict) or not isinstance(inputs.get("Dataset"), str):
        return None
    image = inputs.get("Image")
    path = image.get("Path") if isinstance(image, dict) else None
    return (inputs["Dataset"], path) if isinstance(path, str) else None


def write_provenance(out: Path, outcomes: Sequence[Outcome]) -> None:
    """Rewrite ``slicetime-provenance.json`` to match the files: an entry (with
    ``OutputPath``) for every output whose image and sidecar are in ``out``, none for
    an output that is gone, and under ``Removed`` the outputs this tool withdrew."""
    path = out / PROVENANCE_FILE
    existing = read_json_object(path) or {}
    runs = existing.get("Runs", {})
    runs = dict(runs) if isinstance(runs, dict) else {}
    removed = existing.get("Removed", {})
    removed = dict(removed) if isinstance(removed, dict) else {}
    for outcome in outcomes:
        if outcome.removed is not None:
            runs.pop(json_safe(outcome.removed), None)
            removed[json_safe(outcome.removed)] = outcome.reason or "withdrawn"
        if outcome.output is None or not outcome.ok:
            continue
        key = json_safe(outcome.output)
        removed.pop(key, None)
        entry = outcome.provenance
        if entry is None:
            entry = provenance_entry(output_files(out, outcome.output)[1], outcome.output)
        if entry is not None:
            runs[key] = entry
    for key in list(runs):
        if not any(is_regular_file(image) and is_regular_file(sidecar)
                   for image, sidecar in (output_files(out, k) for k in {key, unescaped(key)})):
            del runs[key]
    content = {
        "Tool": {"Name": "slicetime", "Version": __version__},
        "Runs": dict(sorted(runs.items())),
    }
    if removed:
        content["Removed"] = dict(sorted(removed.items()))
    write_json_atomic(path, content)
