"""``slicetime demo``: the whole job on a small invented study."""

from __future__ import annotations

import sys
from pathlib import Path

import click

from slicetime.interfaces.commands.shared import friendly, interrupted, starting


@click.command()
@click.option("--out", type=click.Path(path_type=Path, file_okay=False), default=Path(
    "demo-output"), show_default=True, help="Folder for the invented dataset and reports.")
@friendly
def demo(out: Path) -> None:
    """Run the whole job on a small invented study (audit, verify, fix, correct)."""
    with starting("demo"):
        from slicetime.interfaces.demo_tour import DemoInterrupted, run_demo

    try:
        code = run_demo(out)
    except DemoInterrupted as stop:  # one line: the step, and what the folder holds
        interrupted(stop.what)
    sys.exit(code)
