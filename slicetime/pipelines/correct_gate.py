"""The Python API's gate (``slicetime.correct_image`` / ``correct_array``): what the
``correct`` command refuses, asked of the same owners (``rules.correction``) for what
the API is given: an image read from a file is audited as ``slicetime show`` audits it
(:func:`check_file`); a bare array shows only its length, and its series kind when the
caller names it (:func:`check_array`). The command's own gate is
``pipelines.correct._refusal``; both word the acceptance of a doubt through
``rules.correction.doubt_refusal``.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from slicetime.pipelines.audit import RunResult, inspect_run_policy
from slicetime.pipelines.errors import (
    DOUBT_CODE,
    NOT_INTERPOLABLE_CODE,
    TOO_FEW_CODE,
    CorrectionRefused,
    TimingInDoubt,
)
from slicetime.policy.model import AcceptEntry
from slicetime.readers.dataset import not_a_run
from slicetime.rules.correction import (
    TrustVerdict,
    doubt_refusal,
    interpolation_refusal,
    judge_trust,
    parse_accept,
    shape_refusal,
    suffix_refusal,
    too_few_volumes,
    too_few_volumes_of,
)


def check_array(n_volumes: int, suffix: str | None = None) -> None:
    """The gate of a bare array (no file, no sidecar, no dataset): the series kind when
    the caller names its BIDS ``suffix`` (``rules.correction.suffix_refusal``) and the
    number of volumes (``too_few_volumes``). Raises :class:`CorrectionRefused`."""
    refusal = suffix_refusal(suffix)
    if refusal is not None:
        raise CorrectionRefused(refusal, NOT_INTERPOLABLE_CODE)
    short = too_few_volumes(n_volumes)
    if short is not None:
        raise CorrectionRefused(short, TOO_FEW_CODE)


def check_file(image: Path, accept: Sequence[str] = (),
               policy_file: Path | None = None) -> TrustVerdict:
    """The gate of an image read from a file, as ``correct`` gates a run: the run is
    audited as ``slicetime show`` audits it (its sidecars, its dataset, its lab policy),
    then refused (:class:`CorrectionRefused`) when its dataset's own lab policy is
    broken, its series may not be interpolated or it is too short, and
    (:class:`TimingInDoubt`) when a doubt about its timing stands that neither
    ``accept`` (``CODE`` or ``CODE:PATTERN``, as ``--accept``) nor the policy's
    ``[[accept]]`` accepts. Returns the verdict (the doubts accepted)."""
    entries = [parse_accept(text) for text in accept]  # ValueError naming a bad one
    never = not_a_run(image.name)
    if never is not None:
        raise CorrectionRefused(f"{image}: not corrected: {never}", NOT_INTERPOLABLE_CODE)
    run, broken, policy_accepted = inspect_run_policy(image, policy_file=policy_file)
    record = run.record
    if broken is not None:
        raise CorrectionRefused(
            f"{broken} (correction does not run without the dataset's lab policy)",
            "policy/invalid", [f for f in run.findings if f.code == "policy/invalid"])
    refusal = interpolation_refusal(record)
    if refusal is not None:
        raise CorrectionRefused(f"{record.path}: {refusal}", NOT_INTERPOLABLE_CODE)
    stacked = shape_refusal(record.header)
    if stacked is not None:
        raise CorrectionRefused(f"{record.path}: {stacked}", NOT_INTERPOLABLE_CODE)
    short = too_few_volumes_of(record.header)  # a 5-D image with dim[5] 1 too
    if short is not None:
        raise CorrectionRefused(f"{record.path}: {short}", TOO_FEW_CODE)
    verdict = judge_run(run, [*entries, *policy_accepted])
    doubted = doubt_refusal(verdict, record.path, _api_accepts)
    if doubted is not None:
        raise TimingInDoubt(f"{record.path}: {doubted}", DOUBT_CODE, verdict.standing)
    return verdict


def judge_run(run: RunResult, accepts: Sequence[AcceptEntry]) -> TrustVerdict:
    """``rules.correction.judge_trust`` over every finding of the audited ``run``, those
    the lab policy ignores included: an ignored finding is hidden from the reports, not
    made trustworthy; only an explicit acceptance lifts a doubt (the command's gate and
    the API's)."""
    seen = [*run.findings, *(item.finding for item in run.ignored)]
    return judge_trust(run.record.path, seen, accepts)


def _api_accepts(specs: list[str]) -> str:
    return f"accept={specs!r}"


__all__ = ["check_array", "check_file", "judge_run"]
