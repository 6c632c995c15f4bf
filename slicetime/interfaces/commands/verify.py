"""``slicetime verify FILES``: each run's claimed slice order against its image data."""

from __future__ import annotations

import sys
from pathlib import Path

import click

from slicetime.interfaces.commands.shared import EXIT_FINDINGS, EXIT_USAGE, UserError, friendly


@click.command()
@click.argument("files", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--format", "fmt", type=click.Choice(["text", "json"]), default="text",
              show_default=True, help="Report format on stdout.")
@friendly
def verify(files: tuple[Path, ...], fmt: str) -> None:
    """Check each run's claimed slice order against its own image data.

    Verdicts: supported, consistent (fits, but another order fits about as
    well), contradicted (naming the order that fits better) or undecidable. Timing
    in milliseconds is reported and the order verified in seconds. Exit 1 when any
    run is contradicted or has timing in milliseconds, 2 when a file cannot be read.
    """
    from slicetime.interfaces.report_json import dumps, verdict_of, verify_object
    from slicetime.pipelines.verify import verify_run
    from slicetime.readers.dataset import find_root
    from slicetime.readers.errors import ReadError, check_regular_file

    outcomes = []
    unreadable: list[dict[str, str]] = []
    for file in files:
        if file.is_dir():
            raise UserError(f"{file}: a folder; verify takes run files (to check every run "
                            f"under a folder: slicetime audit {file} --verify)")
        try:
            check_regular_file(file, str(file), what="image")
            path = file if file.is_absolute() else file.absolute()
            _, outcome = verify_run(find_root(path.parent), path)
        except ReadError as exc:
            click.echo(f"slicetime: {exc.message}", err=True)
            unreadable.append({"file": str(file), "code": exc.code, "message": exc.message})
            continue
        outcomes.append(outcome)
        if fmt == "text":
            finding = outcome.finding
            for note in outcome.units:
                click.echo(f"{'units':<12} {note.message}")
            click.echo(f"{finding.code.split('/')[1]:<12} {finding.message}")
            if outcome.decision is not None and outcome.decision.verdict != "supported":
                d = outcome.decision
                click.echo(f"{'':<12} best: {d.best_name} (score {d.best_score:.3f}; claimed "
                           f"{d.claimed_score:.3f}; shuffled orders {d.null_score:.3f})")
    verdicts = [verdict_of(o) for o in outcomes]
    if fmt == "json":
        click.echo(dumps(verify_object(outcomes, unreadable)))
    if unreadable:
        sys.exit(EXIT_USAGE)
    units = any(o.units for o in outcomes)
    sys.exit(EXIT_FINDINGS if "contradicted" in verdicts or units else 0)
