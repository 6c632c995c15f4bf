"""Checks on a run's file name (pure: the name is part of the record)."""

from __future__ import annotations

from collections.abc import Iterator

from slicetime.model import RunRecord
from slicetime.readers.entities import run_name_problem
from slicetime.rules.registry import Hit


def bad_run_name(record: RunRecord) -> Iterator[Hit]:
    """Every audited run whose name is not a valid BIDS run name: the walk audits only
    names that look like runs (``looks_like_run``), and a file given by path is meant
    as one (``functional.nii``). Without the suffix ``bold`` the checks of a BOLD run's metadata
    (RepetitionTime, SliceTiming) do not apply to it, which the message says."""
    name = record.path.rsplit("/", 1)[-1]
    problem = run_name_problem(name)
    if problem is None:
        return
    message = f"'{name}' is not a valid BIDS run name: {problem}"
    if record.suffix != "bold":
        message += "; the checks of a BOLD run's RepetitionTime and SliceTiming were not applied"
    yield Hit(message, None, {"name": name, "problem": problem}, file=record.path)
