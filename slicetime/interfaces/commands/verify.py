"""``slicetime verify FILES``: each run's claimed slice order against its image data."""

from __future__ import annotations

import sys
from pathlib import Path

import click

from slicetime.interfaces.commands.shared import (
    EXIT_FINDINGS,
    EXIT_USAGE,
    JOBS_HEAVY,
    UserError,
    executor_options,
    friendly,
    interrupted,
    interruptible,
    run_executor,
)
from slicetime.interfaces.screen import say
from slicetime.model import FailOn


@click.command()
@click.argument("files", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--format", "fmt", type=click.Choice(["text", "json"]), default="text",
              show_default=True, help="Report format on stdout (json holds the numbers).")
@click.option("--fail-on", type=click.Choice(FailOn.CHOICES), default="warning",
              show_default=True, help="Exit 1 when a run's verdict reaches this severity "
              "(contradicted is a warning, the other verdicts are notes: error never "
              "exits 1).")
@executor_options(default=JOBS_HEAVY + "; one for a single file")
@friendly
@interruptible("while the runs were read or the report printed; verify writes no file "
               "(what was printed may be cut short)", "verify:start")
def verify(files: tuple[Path, ...], fmt: str, fail_on: str, jobs: int | None,
           scheduler: str | None) -> None:
    """Check each run's claimed slice order against its own image data.

    Verdicts: supported, consistent (fits, but another order fits about as
    well), contradicted (naming the order that fits better, by its scheme
    label; its slice times are in the JSON report) or undecidable (saying why).
    Exit 1 when a verdict reaches --fail-on (by default: a claim contradicted),
    2 when a file cannot be read.
    """
    from slicetime.interfaces.report_json import dumps, verdict_of, verify_object
    from slicetime.interfaces.safe_text import xml_safe
    from slicetime.interfaces.screen import unicode_wanted, width_for
    from slicetime.interfaces.verify_screen import run_lines, summary_line, unreadable_lines
    from slicetime.pipelines.executor import Interrupted
    from slicetime.pipelines.verify import verify_files
    from slicetime.readers.dataset import given_run

    for file in files:
        if file.is_dir():
            raise UserError(f"{file}: a folder; verify takes run files (to check every run "
                            f"under a folder: slicetime audit {file} --verify)")
    files = tuple(given_run(file) for file in files)  # a sidecar: its run; a .bval: exit 2
    if jobs is None and scheduler is None and len(files) == 1:
        jobs = 1
    try:
        with run_executor(jobs, scheduler, light=False, small_results=True) as executor:
            results = verify_files([str(f) for f in files], executor)
    except Interrupted as stop:  # Ctrl-C: what was done, in one line, as audit says it
        finished = sum(1 for r in stop.results if r is not None)
        interrupted(f"; {finished} of {len(stop.results)} runs verified, no report written")
    outcomes = [r.outcome for r in results if r.outcome is not None]
    unreadable = [{"file": r.file, "code": r.code or "file/unreadable",
                   "message": r.message or r.file} for r in results if r.outcome is None]
    for item in unreadable:
        say(f"slicetime: {xml_safe(item['message'])}", err=True)
    if fmt == "json":
        click.echo(dumps(verify_object(outcomes, unreadable)))
    else:
        width = width_for(sys.stdout)
        unicode = unicode_wanted(sys.stdout)
        for result in results:
            if result.outcome is not None:
                lines = run_lines(result.outcome, width, unicode=unicode)
            else:
                lines = unreadable_lines(result.file, result.message or "", width,
                                         unicode=unicode)
            text = "\n".join(lines)
            say(text)
        say(summary_line([verdict_of(o) for o in outcomes], len(unreadable)))
    if unreadable:
        sys.exit(EXIT_USAGE)
    threshold = FailOn.parse(fail_on)
    if any(threshold.fails(o.finding.severity) for o in outcomes):
        sys.exit(EXIT_FINDINGS)
    sys.exit(0)
