"""``slicetime audit PATHS``: every run checked, one report (text, JSON, JSONL, TSV,
JUnit; HTML with --html)."""

from __future__ import annotations

import contextlib
import io
import sys
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

import click

from slicetime.interfaces.commands import shared
from slicetime.interfaces.commands.shared import UserError, friendly
from slicetime.interfaces.screen import say
from slicetime.model import FailOn


def _report_formats() -> Sequence[str]:
    from slicetime.interfaces.report_stream import WRITERS

    return list(WRITERS)


@click.command()
@click.argument("paths", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--format", "fmt", type=shared.RegistryChoice(_report_formats),
              default="text", show_default=True,
              help="Report format on stdout (or --output): text, json (the contract), jsonl "
              "(one object per line), tsv (one row per run) or junit (CI).")
@click.option("--output", type=click.Path(path_type=Path, dir_okay=False),
              help="Write the report to this file instead of stdout.")
@click.option("--html", "html_file", type=click.Path(path_type=Path, dir_okay=False),
              help="Also write a self-contained HTML report with timing diagrams to this "
              "file (works offline; any --format still goes to stdout or --output).")
@click.option("--fail-on", type=click.Choice(FailOn.CHOICES), default="error",
              show_default=True, help="Exit 1 when a finding reaches this severity.")
@click.option("--hide-notes", is_flag=True, help="Leave notes out of the text report.")
@click.option("--all", "show_all", is_flag=True,
              help="Text report: list every run, not only the runs with findings.")
@click.option("--quiet", "-q", is_flag=True,
              help="Print only the summary line (the exit status is unchanged); --output and "
              "--html are still written.")
@click.option("--no-progress", is_flag=True, help="No progress bar or progress lines on stderr.")
@shared.walking_options("audit")
@shared.executor_options(default=shared.JOBS_AUDIT)
@shared.policy_option()
@click.option("--verify", "verify_data", is_flag=True,
              help="Also read each run's image data and check its slice order against it "
              "(a verify/* finding per run; slower: see 'slicetime verify').")
@shared.source_options()
@friendly
def audit(
    paths: tuple[Path, ...],
    fmt: str,
    output: Path | None,
    html_file: Path | None,
    fail_on: str,
    hide_notes: bool,
    show_all: bool,
    quiet: bool,
    no_progress: bool,
    include_derivatives: bool,
    include_sourcedata: bool,
    include_hidden: bool,
    jobs: int | None,
    scheduler: str | None,
    policy_file: Path | None,
    verify_data: bool,
    source_check: bool | None,
    source_map: Path | None,
) -> None:
    """Audit every run under PATHS (dataset roots, subject folders or run files)."""
    with shared.starting("audit"):
        from slicetime.interfaces.progress import progress_reporter
        from slicetime.interfaces.report_source import RunSpool, run_line
        from slicetime.interfaces.report_stream import summary_line
        from slicetime.interfaces.safe_text import xml_safe
        from slicetime.pipelines.audit import audit_stream
        from slicetime.pipelines.executor import Interrupted
        from slicetime.readers.dataset import check_writes

        check_writes(list(paths), {"--output": output, "--html": html_file},
                     inputs=[policy_file, source_map])
        if html_file is not None:
            _require_matplotlib("--html")
    root_given = str(paths[0]) if len(paths) == 1 else " ".join(str(p) for p in paths)
    spool = RunSpool(root_given)
    drawings = None
    if html_file is not None:
        from slicetime.interfaces.report_html_parts import DiagramCollector

        drawings = DiagramCollector()

    # a run's report line (and its page parts) are made where the run is audited: a worker
    # sends back only them and the run's facts, never the whole record
    prepare: Callable[[Any], Any] = run_line
    on_run: Callable[[Any], None] = spool.add_line
    if drawings is not None:
        from slicetime.interfaces.report_html_parts import line_and_parts

        collector = drawings
        prepare = line_and_parts

        def on_run(prepared: Any) -> None:
            line, parts = prepared
            spool.add_line(line)
            collector.add_parts(parts)

    reporter = (contextlib.nullcontext(None) if quiet or no_progress
                else progress_reporter("auditing"))
    written: list[str] = []  # the report files written, for the line a Ctrl-C prints

    def stage(doing: str, point: str) -> contextlib.AbstractContextManager[None]:
        done = f"; {' and '.join(written)} written" if written else ""
        return shared.on_interrupt(f"{doing}{done}", point)

    try:
        with stage("while the runs were audited; no report written", "audit:runs"), \
                shared.run_executor(jobs, scheduler, light=not verify_data,
                                    small_results=True) as executor, \
                reporter as progress:
            try:
                spool.totals = audit_stream(
                    list(paths), on_run, prepare=prepare, progress=progress,
                    include_derivatives=include_derivatives,
                    include_sourcedata=include_sourcedata, include_hidden=include_hidden,
                    policy_file=policy_file, executor=executor, verify=verify_data,
                    source=shared.source_settings(source_check, source_map))
            except Interrupted as stop:
                finished = sum(1 for r in stop.results if r is not None)
                shared.interrupted(f"; {finished} of {len(stop.results)} runs audited, no "
                                   "report written")
        if html_file is not None:
            from slicetime.interfaces.report_html import write_html_stream

            assert drawings is not None
            try:
                with stage(f"while the HTML report was written; {xml_safe(html_file)} not "
                           "written", "audit:html"):
                    write_html_stream(spool, drawings, html_file)
            except OSError as exc:
                raise UserError(f"{html_file}: cannot write the HTML report: "
                                f"{exc.strerror or exc}") from None
            written.append(xml_safe(html_file))
        if output is not None:
            with stage(f"while the report was written; {xml_safe(output)} not written",
                       "audit:output"):
                _write_report(output, lambda fh: _audit_report(spool, fh, fmt, fail_on,
                                                               show_all, not hide_notes))
            written.append(xml_safe(output))
        if quiet or output is None:
            with stage("while the report was printed; what was printed may be cut short",
                       "audit:print"):
                if quiet:
                    from slicetime.interfaces.grouping import group_findings

                    say(summary_line(spool.totals, group_findings(spool)))
                else:
                    with _buffered_stdout() as out:
                        _audit_report(spool, out, fmt, fail_on, show_all, not hide_notes)
    finally:
        spool.close()
    sys.exit(spool.totals.exit_code(fail_on))


def _audit_report(source: Any, out: Any, fmt: str, fail_on: str, show_all: bool,
                  show_notes: bool) -> None:
    from slicetime.interfaces.report_stream import ReportStyle, write_report

    write_report(fmt, source, out, ReportStyle(fail_on=fail_on, show_all=show_all,
                                               show_notes=show_notes))


@contextlib.contextmanager
def _buffered_stdout() -> Iterator[Any]:
    """Standard output for a long report, written in large blocks even where
    ``PYTHONUNBUFFERED`` is set (as in many container images): otherwise every piece
    of every line is a system call of its own (4,000 for a 2,000-run JSON report)."""
    stdout = sys.stdout
    binary = getattr(stdout, "buffer", None)
    if binary is None:  # a stream without a binary layer: written as it is
        yield stdout
        return
    stdout.flush()
    out = io.TextIOWrapper(binary, encoding=stdout.encoding, errors=stdout.errors,
                           write_through=False)
    try:
        yield out
    finally:
        out.flush()
        out.detach()  # standard output stays open


def _write_report(path: Path, write: Callable[[Any], None]) -> None:
    """Write a report atomically (a temporary name beside it, then a rename)."""
    from slicetime.readers.atomic import atomic_file

    try:
        with atomic_file(path) as fh:
            write(fh)
    except OSError as exc:
        raise UserError(f"{path}: cannot write the report: {exc.strerror or exc}") from None


def _require_matplotlib(option: str) -> None:
    """Exit 2 with what to install when the optional drawing library is missing."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        raise UserError(f"{option} draws timing diagrams with matplotlib, which is not "
                        "installed: pip install matplotlib") from None
