"""What ``correct`` may act on, and the codes it gives a run it refuses for its own reasons.

The codes are not audit checks: the audit never reports them. ``correct`` attaches
them to a refused run (its ``blocking_findings``) so that ``slicetime explain``
documents every reason a run was not corrected.

The judgements, each with one owner here (pure, no I/O):

* :func:`timing_doubts` / :func:`judge_trust`: whether the run's timing stands in
  doubt (a finding whose rule is registered with ``timing_in_doubt``, at warning
  level or above) and which doubts the user accepted (``--accept``, ``[[accept]]``);
* :func:`interpolation_refusal`: whether the run's volumes may be interpolated at
  all (BOLD-type series only);
* :data:`MIN_VOLUMES`: the shortest run worth correcting (from the measured edge error).
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

from slicetime.codes import RULES
from slicetime.model import Finding, RunRecord, Severity
from slicetime.policy.model import AcceptEntry
from slicetime.policy.patterns import path_pattern_problem
from slicetime.rules.registry import reader_code

reader_code(
    "correct/output-clash",
    checked="correcting",
    title="two inputs would be written to one corrected output",
    severity=Severity.ERROR,
    rationale=(
        "The output name is the input's path with the desc entity replaced and the image "
        "extension kept, and the sidecar drops the extension: runs whose names differ only "
        "in desc-, or a .nii and a .nii.gz of one run, or an output that an earlier batch "
        "wrote from another input dataset, would all land on one file. One would silently "
        "overwrite the other and every rerun would redo both, so every run involved is "
        "refused and none is written."
    ),
    fix=(
        "Keep one of the inputs (remove or rename the other), or correct them into separate "
        "--out folders."
    ),
)
reader_code(
    "correct/implausible-timing",
    checked="correcting",
    title="the timing is physically impossible for an fMRI run",
    severity=Severity.ERROR,
    rationale=(
        "A repetition time or volume spacing outside 0.05 to 100 s, a DelayTime or "
        "AcquisitionDuration above 100 s, or slice times outside the acquisition window "
        "cannot describe a functional run; they are almost always in the wrong unit. "
        "Resampling with them would shift every slice by a meaningless amount, so the run "
        "is refused even with --force."
    ),
    fix="Correct the values (slicetime fix repairs millisecond values), then rerun.",
)
reader_code(
    "correct/scaling-range",
    checked="correcting",
    title="the header's scaling gives values a float32 output cannot hold",
    severity=Severity.ERROR,
    rationale=(
        "scl_slope and scl_inter turn stored values into real values. A non-finite "
        "scl_inter with a valid scl_slope, or a slope and intercept that take the stored "
        "values beyond the float32 range, would write inf or nan into the corrected "
        "image (NIfTI-1: value = scl_slope * stored + scl_inter)."
    ),
    fix="Check scl_slope and scl_inter in the image header; rewrite the image with sane ones.",
)
reader_code(
    "correct/timing-in-doubt",
    checked="correcting",
    title="the run's slice times are in doubt, so it is not corrected",
    severity=Severity.ERROR,
    rationale=(
        "Another source contradicts the slice times the run's metadata gives: the NIfTI "
        "header, the source DICOM series, the image data (verify), the lab's protocol or the "
        "dataset's other runs of the same task (the audit's findings whose rules say so; "
        "slicetime explain CODE tells). Correcting with times that may be wrong moves every "
        "slice by the wrong amount and makes the timing error worse than doing nothing, and "
        "the output no longer shows it. So correct refuses such a run, at warning level or "
        "above, even with --force, until someone who knows the acquisition accepts the doubt "
        "for that code and those runs."
    ),
    fix=(
        "Resolve the contradiction (slicetime show RUN; slicetime fix repairs many), or, "
        "when you know the run's own metadata is right, accept the doubt: correct --accept "
        "CODE[:PATH-PATTERN], or an [[accept]] entry with a reason in the lab policy. The "
        "outcome, the output sidecar and the provenance record every accepted doubt."
    ),
)
reader_code(
    "correct/not-interpolable",
    checked="correcting",
    title="the run is not a BOLD-type time series, so its volumes must not be interpolated",
    severity=Severity.ERROR,
    rationale=(
        "Slice-timing correction interpolates each voxel between neighbouring volumes, which "
        "assumes the volumes sample one slowly varying signal. Only BOLD-type series (bold, "
        "cbv, phase and their echoes) do. Diffusion volumes differ in b-value and gradient "
        "direction, so interpolating across them mixes contrasts (a b=1500 slice takes values "
        "from the b=5 volumes beside it); arterial spin labelling alternates label and control "
        "volumes, whose difference is the signal interpolation destroys; a single-band "
        "reference or an M0 scan is not a time series at all."
    ),
    fix=(
        "Leave such runs out of correct (their timing is handled by their own models); "
        "correct the BOLD runs."
    ),
)
reader_code(
    "correct/too-few-volumes",
    checked="correcting",
    title="the run has too few volumes to be corrected",
    severity=Severity.ERROR,
    rationale=(
        "Near the first and last volumes every method has to invent what lies beyond the "
        "run, and its error there is large: measured for a shift of half a TR (benchmarks/"
        "bench_edges.py, table in the README), the whole-run error is 57 % of doing nothing "
        "at 2 volumes, 33 % at 4 and 24 to 28 % at 5, about a fifth (19 to 21 %) at 6 and "
        "less from 8 on, for the fourier, sinc and cubic methods. Below 6 volumes a "
        "correction gives little and looks like more than it is."
    ),
    fix="Correct only complete runs; a run this short is usually a test or a broken export.",
)

reader_code(
    "correct/record-unwritten",
    checked="correcting",
    title="the output folder's description or provenance file could not be written",
    severity=Severity.ERROR,
    rationale=(
        "After the runs, correct rewrites dataset_description.json and the provenance file "
        "of --out so that they list exactly the outputs on disk. When that write fails (a "
        "full disk, a folder that became read-only), the corrected runs are still in place "
        "and reported, but the folder's own record of them is out of date, so the batch "
        "ends with exit status 1."
    ),
    fix="Free space or restore write access to --out, then rerun the same command: the "
        "outputs in place are reused and the record is written again.",
)

#: the fewest volumes a run needs to be corrected: from the measured whole-run error
#: (benchmarks/bench_edges.py; README "The run's ends"), 6 volumes is the first count at
#: which fourier, sinc and cubic come down to about a fifth of the uncorrected error
#: (0.19 to 0.21; 0.24 to 0.28 at 5)
MIN_VOLUMES = 6

#: the suffixes whose volumes sample one slowly varying signal (BIDS: func datatype)
BOLD_TYPE_SUFFIXES = frozenset({"bold", "cbv", "phase"})

#: why interpolating across the volumes of each other kind is wrong
_NOT_INTERPOLABLE = {
    "dwi": "a diffusion series: its volumes differ in b-value and gradient direction, so "
    "interpolating across them mixes contrasts",
    "asl": "an arterial spin labelling series: label and control volumes alternate and "
    "their difference is the signal, which interpolating across them destroys",
    "sbref": "a single-band reference image, not a time series",
    "m0scan": "an M0 calibration scan, not a BOLD time series",
}
_FOLDER_KINDS = {"dwi": "dwi", "perf": "asl"}
_WORD = re.compile(r"[A-Za-z0-9]+")


def series_kind(record: RunRecord) -> str | None:
    """The kind of series that may not be interpolated (``dwi``, ``asl``, ``sbref``,
    ``m0scan`` or another non-BOLD suffix), or None for a BOLD-type series. A name that
    is not a valid BIDS name is judged by its words and its folder."""
    if record.suffix:
        return None if record.suffix in BOLD_TYPE_SUFFIXES else record.suffix
    words = {w.lower() for w in _WORD.findall(record.path.rsplit("/", 1)[-1])}
    for kind in _NOT_INTERPOLABLE:
        if kind in words:
            return kind
    if words & BOLD_TYPE_SUFFIXES:
        return None
    return _FOLDER_KINDS.get(record.datatype or "")


def interpolation_refusal(record: RunRecord) -> str | None:
    """Why the run's volumes may not be interpolated, or None when they may: the one
    owner of "may this run be corrected at all" (``correct/not-interpolable``)."""
    kind = series_kind(record)
    if kind is None:
        return None
    why = _NOT_INTERPOLABLE.get(kind, f"suffix {kind!r} is not a BOLD-type time series "
                                "(bold, cbv, phase)")
    return f"not corrected: {why}"


def timing_doubts(findings: Iterable[Finding]) -> list[Finding]:
    """The findings that put the run's slice times in doubt: of a code registered with
    ``timing_in_doubt``, at warning level or above. The one owner of "does this run's
    timing stand in doubt" (``correct`` reads it; ``slicetime explain`` says it)."""
    return [f for f in findings
            if f.severity.rank >= Severity.WARNING.rank and doubts_timing(f.code)]


def doubts_timing(code: str) -> bool:
    rule = RULES.get(code)
    return rule is not None and rule.timing_in_doubt


@dataclass(frozen=True)
class TrustVerdict:
    """The doubts of one run: those still standing, and those accepted (with by whom)."""

    standing: tuple[Finding, ...] = ()
    accepted: tuple[tuple[Finding, AcceptEntry], ...] = ()


def judge_trust(path: str, findings: Iterable[Finding],
                accepts: Sequence[AcceptEntry]) -> TrustVerdict:
    """Split the run's doubts (:func:`timing_doubts`) into those an entry of ``accepts``
    covers for this run (``path``: relative to its dataset root) and the others."""
    standing: list[Finding] = []
    accepted: list[tuple[Finding, AcceptEntry]] = []
    for finding in timing_doubts(findings):
        entry = next((a for a in accepts if a.covers(path, finding.code)), None)
        if entry is None:
            standing.append(finding)
        else:
            accepted.append((finding, entry))
    return TrustVerdict(tuple(standing), tuple(accepted))


def accept_problem(code: str) -> str | None:
    """Why ``code`` cannot be accepted (it must name one code that doubts timing)."""
    if code not in RULES:
        return f"{code!r} is not a finding code (slicetime explain lists them)"
    if not doubts_timing(code):
        doubting = ", ".join(sorted(c for c in RULES if doubts_timing(c)))
        return (f"{code} does not put the timing in doubt, so there is nothing to accept "
                f"(--force is for errors); the codes that do: {doubting}")
    return None


def parse_accept(text: str) -> AcceptEntry:
    """``CODE`` or ``CODE:PATTERN`` (a run path pattern, as in the lab policy) as an
    :class:`AcceptEntry`; :class:`ValueError` with a one-line reason otherwise."""
    code, colon, pattern = text.strip().partition(":")
    problem = accept_problem(code)
    if problem is None and colon:
        why = path_pattern_problem(pattern)
        problem = f"path pattern {pattern!r} {why}" if why else None
    if problem is not None:
        raise ValueError(problem)
    return AcceptEntry(index=-1, codes=(code,), reason="accepted on the command line",
                       paths=(pattern,) if colon else ("**",), given=f"--accept {text.strip()}")
