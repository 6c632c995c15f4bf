"""``slicetime show FILE``: one run (or one DICOM series) in full."""

from __future__ import annotations

import os
import sys
from pathlib import Path
from typing import NoReturn

import click

from slicetime.interfaces.commands.shared import (
    EXIT_FINDINGS,
    UserError,
    former_spelling,
    friendly,
    interrupted,
    policy_option,
    starting,
)
from slicetime.model import FailOn


@click.command()
@click.argument("file", type=click.Path(path_type=Path))
@click.option("--format", "fmt", type=click.Choice(["text", "json"]), default="text",
              show_default=True, help="json: print the run object of the JSON report.")
@click.option("--json", "former_json", is_flag=True, hidden=True,
              help="Former spelling of --format json (read until the next release).")
@click.option("--fail-on", type=click.Choice(FailOn.CHOICES), default="error",
              show_default=True, help="Exit 1 when one of the run's findings reaches this "
              "severity.")
@policy_option()
@friendly
def show(file: Path, fmt: str, former_json: bool, fail_on: str,
         policy_file: Path | None) -> None:
    """Show one run: its schedule, where each value came from, its scheme and findings.

    FILE is the run's image or its own sidecar (_bold.json). The findings are
    exactly those `slicetime audit` gives the run: its dataset is audited (header
    bytes only) with the lab policy, so the dataset-wide checks are included.
    A DICOM file or series folder shows the series' own slice times and scheme.
    """
    with starting("show"):
        from slicetime.interfaces.report_json import dumps, run_object
        from slicetime.interfaces.terminal import make_console, render_show
        from slicetime.model import Counts
        from slicetime.pipelines.audit import inspect_run
        from slicetime.pipelines.signals import test_point
        from slicetime.readers.dicom import is_dicom_input

        if former_json:
            former_spelling("show --json", "show --format json")
        as_json = former_json or fmt == "json"
        series = is_dicom_input(str(file))
        target = None if series else _show_target(file)
    if target is None:
        try:
            test_point("show:series")
            _show_series(file, as_json)
        except KeyboardInterrupt:
            _interrupted("while the series was read or shown")
        return
    try:
        test_point("show:audit")
        run = inspect_run(target, policy_file=policy_file)
    except KeyboardInterrupt:
        _interrupted("while the run's dataset was audited, before anything was shown")
    try:
        test_point("show:print")
        if as_json:
            from slicetime.interfaces.source_view import run_source_object

            obj = run_object(run)
            if run.record.source is not None:
                obj["source"] = run_source_object(run.record)
            click.echo(dumps(obj))
        else:
            from slicetime.interfaces.source_view import render_run_source

            render_show(run, make_console())
            render_run_source(run.record, make_console())
    except KeyboardInterrupt:
        _interrupted("while the run was shown (what is on screen may be cut short)")
    if FailOn.parse(fail_on).reached(Counts.of(run.findings)):
        sys.exit(EXIT_FINDINGS)


def _interrupted(what: str) -> NoReturn:
    """Ctrl-C: one line saying how far ``show`` got (it writes no file), exit 130."""
    interrupted(f"{what}; show writes no file")


def _show_target(file: Path) -> Path:
    """The run image that ``show FILE`` means (:func:`~slicetime.readers.dataset.given_run`);
    a folder or a path that does not exist is a usage mistake."""
    from slicetime.readers.dataset import given_run

    if not os.path.lexists(file):
        raise UserError(f"{file}: file does not exist")
    if file.is_dir():
        raise UserError(f"{file}: a folder; show takes one run (its image or its own sidecar); "
                        f"to check every run under it: slicetime audit {file}")
    return given_run(file)


def _show_series(file: Path, as_json: bool) -> None:
    from slicetime.interfaces.source_view import show_series
    from slicetime.interfaces.terminal import make_console

    show_series(str(file), as_json, make_console())  # ReadError: one line, exit 2
