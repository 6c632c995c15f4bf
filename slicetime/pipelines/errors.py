"""Problems with what the user asked a pipeline to do (the CLI turns them into exit 2)."""

from __future__ import annotations


class NoRunsError(ValueError):
    """A path given on the command line holds no run: nothing found is not success."""

    def __init__(self, path: str, *, is_folder: bool) -> None:
        self.path = path
        where = "under this folder" if is_folder else "in this file"
        super().__init__(
            f"{path}: no functional runs found {where} (runs are NIfTI time series such as "
            "*_bold.nii.gz; derivatives/, sourcedata/, code/ and hidden folders are skipped "
            "unless included)"
        )
