"""Documentation of the codes ``correct`` gives a run it refuses for its own reasons.

These are not audit checks: the audit never reports them. ``correct`` attaches
them to a refused run (its ``blocking_findings``) so that ``slicetime explain``
documents every reason a run was not corrected.
"""

from __future__ import annotations

from slicetime.model import Severity
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
