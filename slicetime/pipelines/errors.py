"""Problems with what the user asked a pipeline to do (the CLI turns them into exit 2),
and the error a single run's correction raises (it becomes that run's outcome)."""

from __future__ import annotations


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


#: codes of the refusals ``correct`` makes itself (declared in slicetime/data/codes.toml)
CLASH_CODE = "correct/output-clash"
IMPLAUSIBLE_CODE = "correct/implausible-timing"
SCALING_CODE = "correct/scaling-range"
DOUBT_CODE = "correct/timing-in-doubt"
NOT_INTERPOLABLE_CODE = "correct/not-interpolable"
TOO_FEW_CODE = "correct/too-few-volumes"
UNWRITTEN_CODE = "correct/record-unwritten"
