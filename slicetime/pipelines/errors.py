"""Problems with what the user asked a pipeline to do (the CLI turns them into exit 2),
and the error a single run's correction raises (it becomes that run's outcome)."""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from slicetime.model import Finding


class NoRunsError(ValueError):
    """A path given on the command line holds no run: nothing found is not success."""

    def __init__(self, path: str, *, is_folder: bool, why: str | None = None) -> None:
        self.path = path
        where = "under this folder" if is_folder else "in this file"
        super().__init__(
            f"{path}: no functional runs found {where} ({why}; runs are NIfTI time series "
            "such as *_bold.nii.gz)" if why is not None else
            f"{path}: no functional runs found {where} (runs are NIfTI time series such as "
            "*_bold.nii.gz; derivatives/, sourcedata/, code/ and hidden folders are skipped "
            "unless included)"
        )


class CorrectionError(Exception):
    """A run cannot be corrected; the message names the file and the reason.

    With a ``code`` (a registered ``correct/*`` code) the run is *refused* and the
    code becomes one of its blocking findings; without one it *failed*."""

    def __init__(self, message: str, code: str | None = None, field: str | None = None):
        super().__init__(message)
        self.code = code
        self.field = field


class CorrectionRefused(ValueError):
    """The Python API (``slicetime.correct_image``, ``slicetime.correct_array``) will not
    correct this run, for a reason the ``correct`` command refuses it too.

    ``code`` is the command's refusal code (``correct/not-interpolable``,
    ``correct/too-few-volumes``, ``correct/timing-in-doubt``, or ``policy/invalid``
    for a dataset whose own lab policy is broken; ``slicetime explain CODE`` says
    more); ``findings`` are the audit's findings behind the refusal (the doubts, for
    :class:`TimingInDoubt`). A ``ValueError``, as every other bad input to the API."""

    def __init__(self, message: str, code: str, findings: Sequence[Finding] = ()) -> None:
        super().__init__(message)
        self.code = code
        self.findings: tuple[Finding, ...] = tuple(findings)


class TimingInDoubt(CorrectionRefused):
    """The run's slice times stand in doubt (the audit found a finding whose code puts
    them in doubt, e.g. the header's ``slice_code`` against ``SliceTiming``). The message
    names each doubt and the ``accept=[...]`` that accepts it, the API's form of the
    command's ``--accept CODE[:PATTERN]``; ``codes`` are the codes in doubt."""

    @property
    def codes(self) -> list[str]:
        return sorted({f.code for f in self.findings})


#: codes of the refusals ``correct`` makes itself (declared in slicetime/data/codes.toml)
CLASH_CODE = "correct/output-clash"
IMPLAUSIBLE_CODE = "correct/implausible-timing"
SCALING_CODE = "correct/scaling-range"
DOUBT_CODE = "correct/timing-in-doubt"
NOT_INTERPOLABLE_CODE = "correct/not-interpolable"
TOO_FEW_CODE = "correct/too-few-volumes"
UNWRITTEN_CODE = "correct/record-unwritten"
