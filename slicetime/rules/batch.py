"""Documentation of the codes the batch executor raises for a run it could not finish.

These are not checks of the data: they say that the run was not audited (or
corrected) because its worker failed, so a batch never silently skips a run.
"""

from __future__ import annotations

from slicetime.model import Severity
from slicetime.rules.registry import reader_code

reader_code(
    "batch/worker-lost",
    checked="batch",
    title="the run was not processed: its worker stopped twice",
    severity=Severity.ERROR,
    rationale=(
        "A worker process (local or on a Dask cluster) died while it held this run, and the "
        "retry died too: typically memory exhaustion or a node that left the cluster. The run "
        "itself may be fine; nothing is known about it."
    ),
    fix="Rerun the audit for this run alone; if it fails again, check the worker's memory limit.",
)
reader_code(
    "batch/internal-error",
    checked="batch",
    title="slicetime failed on this run (a bug)",
    severity=Severity.ERROR,
    rationale=(
        "An unexpected error stopped the checks of this run; the other runs were processed. "
        "The message names the error."
    ),
    fix="Rerun with SLICETIME_DEBUG=1 for the traceback and report it with the file.",
)
