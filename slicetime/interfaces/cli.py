"""The ``slicetime`` command line. Thin: parse, call a pipeline, render.

Exit codes (contract): 0 nothing at or above ``--fail-on``; 1 findings at or
above it; 2 bad usage or unreadable input given explicitly. A user's mistake
or a bad file never produces a traceback: it is one line on stderr.
"""

from __future__ import annotations

import contextlib
import functools
import io
import json
import os
import sys
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any, Literal, TypeVar

import click

from slicetime import __version__
from slicetime.model import MAX_REPETITION_TIME

F = TypeVar("F", bound=Callable[..., Any])

EXIT_FINDINGS = 1
EXIT_USAGE = 2
EXIT_INTERNAL = 3


class RegistryChoice(click.Choice):
    """A choice read from a registry the first time click needs it (parsing the option,
    help, completion), so that starting the command line imports no registry (the
    engines import numpy). Adding an engine to ``ENGINES`` adds it to ``--method``."""

    def __init__(self, load: Callable[[], Sequence[str]]) -> None:
        self._load = load
        self._names: tuple[str, ...] | None = None
        super().__init__([])

    @property  # click declares choices as a plain attribute
    def choices(self) -> tuple[str, ...]:
        if self._names is None:
            self._names = tuple(self._load())
        return self._names

    @choices.setter
    def choices(self, value: Sequence[str]) -> None:
        pass  # click.Choice.__init__ stores the (empty) list given: the registry decides


def _engine_names() -> Sequence[str]:
    from slicetime.engines.interpolate import ENGINES

    return list(ENGINES)


def _report_formats() -> Sequence[str]:
    from slicetime.interfaces.report_stream import WRITERS

    return list(WRITERS)


# --------------------------------------------------------------------------- option groups
# Options several commands share, declared once: a command applies the group where its
# options stood (click lists options in decorator order), and keeps their names.


def _options(*decorators: Callable[[F], F]) -> Callable[[F], F]:
    """Several click options as one decorator, listed in the order given."""

    def apply(fn: F) -> F:
        for decorate in reversed(decorators):
            fn = decorate(fn)
        return fn

    return apply


def walking_options(verb: str) -> Callable[[F], F]:
    """``--include-derivatives``, ``--include-sourcedata``, ``--include-hidden``: the
    parts of a dataset the walk leaves out by default. ``verb``: what the command does
    to the runs found there ("audit", "correct")."""
    return _options(
        click.option("--include-derivatives", is_flag=True,
                     help=f"Also {verb} runs in derivatives/."),
        click.option("--include-sourcedata", is_flag=True,
                     help=f"Also {verb} runs in sourcedata/."),
        click.option("--include-hidden", is_flag=True,
                     help=f"Also {verb} hidden folders and files."),
    )


#: what ``--jobs`` defaults to (``pipelines.executor.make_executor``): header-only work
#: (audit, fix) and work that reads image data (correct)
JOBS_LIGHT = "the CPUs available; one on machines with 2 or fewer"
JOBS_AUDIT = "the CPUs available; on machines with 2 or fewer, one below 500 runs"
JOBS_HEAVY = "the CPUs available; memory grows with each"


def executor_options(*, default: str, shared: str = "Files") -> Callable[[F], F]:
    """``--jobs`` and ``--scheduler``: where the runs are processed. ``default`` names
    the command's default for ``--jobs`` (:data:`JOBS_LIGHT`, :data:`JOBS_AUDIT`,
    :data:`JOBS_HEAVY`); ``shared``: what the Dask workers must see."""
    return _options(
        click.option("--jobs", type=click.IntRange(min=1), default=None,
                     help=f"Local worker processes (default: {default})."),
        click.option("--scheduler", metavar="ADDRESS",
                     help="Run on a Dask cluster: the address of its scheduler "
                     f"(tcp://host:8786). {shared} must be on a file system the workers "
                     "share."),
    )


def policy_option(purpose: str = "") -> Callable[[F], F]:
    """``--policy FILE``; ``purpose``: what this command uses the policy for."""
    return click.option(
        "--policy", "policy_file", type=click.Path(path_type=Path, dir_okay=False),
        help="Lab policy (TOML). Default: slicetime-policy.toml at the dataset root."
        + (f" {purpose}" if purpose else ""))


def source_options(*, switch: bool = True, purpose: str = "") -> Callable[[F], F]:
    """``--source/--no-source`` (when ``switch``) and ``--source-map``: the cross-check
    with the DICOM series under sourcedata/ (:func:`_source_options` reads them)."""
    source_map = click.option(
        "--source-map", "source_map", type=click.Path(path_type=Path, dir_okay=False),
        help="TSV of run path and series folder (relative to the dataset root, or "
        "absolute): these matches win over SeriesNumber and geometry."
        + (f" {purpose}" if purpose else ""))
    if not switch:
        return source_map
    return _options(
        click.option("--source/--no-source", "source_check", default=None,
                     help="Check each run against its DICOM series under sourcedata/ "
                     "(default: on when the dataset has a sourcedata/ folder; --source also "
                     "notes runs without a series)."),
        source_map,
    )


class UserError(click.ClickException):
    """A one-line problem with what the user asked for (exit 2)."""

    exit_code = EXIT_USAGE

    def show(self, file: Any = None) -> None:
        click.echo(f"slicetime: {self.format_message()}", err=True)


def friendly(fn: F) -> F:
    """Turn reader errors into one-line messages and unexpected crashes into exit 3."""

    @functools.wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        from slicetime.pipelines.errors import NoRunsError
        from slicetime.readers.errors import ReadError

        try:
            return fn(*args, **kwargs)
        except ReadError as exc:
            raise UserError(exc.message) from None
        except NoRunsError as exc:
            raise UserError(str(exc)) from None
        except (click.ClickException, click.exceptions.Exit, click.Abort, SystemExit):
            raise
        except KeyboardInterrupt:
            click.echo("slicetime: interrupted", err=True)
            sys.exit(130)
        except BrokenPipeError:
            sys.exit(0)
        except Exception as exc:  # a bug: keep the user's terminal clean, allow debugging
            if os.environ.get("SLICETIME_DEBUG"):
                raise
            click.echo(
                f"slicetime: internal error ({type(exc).__name__}: {exc}); "
                "rerun with SLICETIME_DEBUG=1 for the traceback and please report it",
                err=True,
            )
            sys.exit(EXIT_INTERNAL)

    return wrapper  # type: ignore[return-value]  # functools.wraps keeps the signature


EXIT_STATUSES = """\b
Exit status (every command):
  0    nothing at or above --fail-on (audit, show), every run corrected or up to
       date (correct), nothing to fix or everything applied (fix), no claim
       contradicted (verify)
  1    a finding at or above --fail-on (audit, show; also a file show cannot
       read), a run refused or failed (correct), changes planned or files
       refused (fix), a claim contradicted (verify)
  2    bad usage: an unknown option or value, a path that does not exist or
       holds no run, an unreadable file or policy named on the command line, a
       missing optional part (e.g. matplotlib for --html)
  3    internal error (a bug: rerun with SLICETIME_DEBUG=1 and report it)
  130  interrupted (Ctrl-C)
\b
Shell completion (bash, zsh, fish): see README, "Shell completion", e.g.
  eval "$(_SLICETIME_COMPLETE=bash_source slicetime)"
"""


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100},
             epilog=EXIT_STATUSES)
@click.version_option(__version__, prog_name="slicetime")
def cli() -> None:
    """Audit, repair and correct fMRI slice timing across BIDS-style datasets."""


# --------------------------------------------------------------------------- show
@cli.command()
@click.argument("file", type=click.Path(path_type=Path))
@click.option("--json", "as_json", is_flag=True, help="Print the run object of the JSON report.")
@click.option("--fail-on", type=click.Choice(["error", "warning", "never"]), default="error",
              show_default=True, help="Exit 1 when one of the run's findings reaches this "
              "severity.")
@policy_option()
@friendly
def show(file: Path, as_json: bool, fail_on: str, policy_file: Path | None) -> None:
    """Show one run: its schedule, where each value came from, its scheme and findings.

    FILE is the run's image or its own sidecar (_bold.json). The findings are
    exactly those `slicetime audit` gives the run: its dataset is audited (header
    bytes only) with the lab policy, so the dataset-wide checks are included.
    A DICOM file or series folder shows the series' own slice times and scheme.
    """
    from slicetime.interfaces.report_json import dumps, run_object
    from slicetime.interfaces.terminal import make_console, render_show
    from slicetime.model import Severity
    from slicetime.pipelines.audit import inspect_run

    if _is_dicom_input(file):
        _show_series(file, as_json)
        return
    run = inspect_run(_show_target(file), policy_file=policy_file)
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
    if fail_on != "never":
        level = Severity.parse(fail_on).rank
        sys.exit(EXIT_FINDINGS if any(f.severity.rank >= level for f in run.findings) else 0)


def _show_target(file: Path) -> Path:
    """The run image that ``show FILE`` means: the file itself, or the image beside a
    run's own sidecar. A folder or a sidecar without its image is a usage mistake."""
    if not os.path.lexists(file):
        raise UserError(f"{file}: file does not exist")
    if file.is_dir():
        raise UserError(f"{file}: a folder; show takes one run (its image or its own sidecar); "
                        f"to check every run under it: slicetime audit {file}")
    if file.name.lower().endswith(".json"):
        stem = file.name[: -len(".json")]
        for ext in (".nii.gz", ".nii"):
            image = file.with_name(stem + ext)
            if os.path.lexists(image):
                return image
        raise UserError(f"{file}: a sidecar without a run image beside it (no {stem}.nii.gz "
                        f"or {stem}.nii); an inherited sidecar serves several runs: show one "
                        "of them, or audit the folder")
    return file


def _is_dicom_input(file: Path) -> bool:
    """A series folder or a DICOM file (not a NIfTI run) given to ``show``."""
    from slicetime.readers.dataset import is_image_name
    from slicetime.readers.dicom import is_dicom_file, series_files

    if is_image_name(file.name):
        return False
    if file.is_dir():
        try:
            files = series_files(str(file))
        except OSError:
            return False
        return bool(files) and is_dicom_file(files[0])
    return file.is_file() and is_dicom_file(str(file))


def _show_series(file: Path, as_json: bool) -> None:
    from slicetime.interfaces.report_json import dumps
    from slicetime.interfaces.source_view import render_series, series_object
    from slicetime.interfaces.terminal import make_console
    from slicetime.readers.dicom import read_series

    series = read_series(str(file), str(file))  # ReadError: one line, exit 2
    if as_json:
        click.echo(dumps(series_object(series)))
    else:
        render_series(series, make_console())


# --------------------------------------------------------------------------- audit
@cli.command()
@click.argument("paths", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--format", "fmt", type=RegistryChoice(_report_formats),
              default="text", show_default=True,
              help="Report format on stdout (or --output): text, json (the contract), jsonl "
              "(one object per line), tsv (one row per run) or junit (CI).")
@click.option("--output", type=click.Path(path_type=Path, dir_okay=False),
              help="Write the report to this file instead of stdout.")
@click.option("--html", "html_file", type=click.Path(path_type=Path, dir_okay=False),
              help="Also write a self-contained HTML report with timing diagrams to this "
              "file (works offline; any --format still goes to stdout or --output).")
@click.option("--fail-on", type=click.Choice(["error", "warning", "never"]), default="error",
              show_default=True, help="Exit 1 when a finding reaches this severity.")
@click.option("--hide-notes", is_flag=True, help="Leave notes out of the text report.")
@click.option("--all", "show_all", is_flag=True,
              help="Text report: list every run, not only the runs with findings.")
@click.option("--quiet", "-q", is_flag=True,
              help="Print only the summary line (the exit status is unchanged); --output and "
              "--html are still written.")
@click.option("--no-progress", is_flag=True, help="No progress bar or progress lines on stderr.")
@walking_options("audit")
@executor_options(default=JOBS_AUDIT)
@policy_option()
@click.option("--verify", "verify_data", is_flag=True,
              help="Also read each run's image data and check its slice order against it "
              "(a verify/* finding per run; slower: see 'slicetime verify').")
@source_options()
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
    from slicetime.interfaces.progress import progress_reporter
    from slicetime.interfaces.report_stream import RunSpool, run_line, summary_line
    from slicetime.pipelines.audit import audit_stream
    from slicetime.pipelines.executor import Interrupted

    if html_file is not None:
        _require_matplotlib("--html")
    root_given = str(paths[0]) if len(paths) == 1 else " ".join(str(p) for p in paths)
    spool = RunSpool(root_given)
    drawings = None
    if html_file is not None:
        from slicetime.interfaces.report_html import DiagramCollector

        drawings = DiagramCollector()

    # a run's report line (and its page parts) are made where the run is audited: a worker
    # sends back only them and the run's facts, never the whole record
    prepare: Callable[[Any], Any] = run_line
    on_run: Callable[[Any], None] = spool.add_line
    if drawings is not None:
        from slicetime.interfaces.report_html import line_and_parts

        collector = drawings
        prepare = line_and_parts

        def on_run(prepared: Any) -> None:
            line, parts = prepared
            spool.add_line(line)
            collector.add_parts(parts)

    reporter = (contextlib.nullcontext(None) if quiet or no_progress
                else progress_reporter("auditing"))
    try:
        with _executor(jobs, scheduler, light=not verify_data,
                       small_results=True) as executor, \
                reporter as progress:
            try:
                spool.totals = audit_stream(
                    list(paths),
                    on_run,
                    prepare=prepare,
                    include_derivatives=include_derivatives,
                    include_sourcedata=include_sourcedata,
                    include_hidden=include_hidden,
                    progress=progress,
                    policy_file=policy_file,
                    executor=executor,
                    verify=verify_data,
                    source=_source_options(source_check, source_map),
                )
            except Interrupted as stop:
                finished = sum(1 for r in stop.results if r is not None)
                click.echo(f"slicetime: interrupted; {finished} of {len(stop.results)} runs "
                           "audited, no report written", err=True)
                sys.exit(130)
        if html_file is not None:
            from slicetime.interfaces.report_html import write_html_stream

            assert drawings is not None
            try:
                write_html_stream(spool, drawings, html_file)
            except OSError as exc:
                raise UserError(f"{html_file}: cannot write the HTML report: "
                                f"{exc.strerror or exc}") from None
        if output is not None:
            _write_report(output, lambda fh: _audit_report(spool, fh, fmt, fail_on, show_all,
                                                           not hide_notes))
        if quiet:
            click.echo(summary_line(spool.totals))
        elif output is None:
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


def _source_options(check: bool | None, source_map: Path | None) -> Any:
    """The source cross-check the options ask for (a bad map file: exit 2)."""
    from slicetime.readers.source import SourceOptions, load_source_map

    mapping = load_source_map(source_map) if source_map is not None else {}
    mode: Literal["auto", "on", "off"] = (
        "off" if check is False else "on" if check or mapping else "auto")
    return SourceOptions(mode=mode, mapping=mapping)


@contextlib.contextmanager
def _executor(jobs: int | None, scheduler: str | None, *, light: bool = True,
              small_results: bool = False) -> Iterator[Any]:
    """The executor the options ask for; a note on stderr of where the work ran.
    ``light``: header-only work per run (audit, fix); ``small_results``: the workers
    send back little (see ``make_executor``)."""
    from slicetime.pipelines.executor import ExecutorError, make_executor
    from slicetime.words import count

    try:
        executor = make_executor(jobs, scheduler, light=light, small_results=small_results)
    except ExecutorError as exc:
        raise UserError(str(exc)) from None
    try:
        yield executor
    finally:
        stats = executor.stats
        if executor.name == "dask":
            click.echo(f"slicetime: ran on {count(len(stats.workers), 'Dask worker')} of "
                       f"{scheduler}", err=True)
        if stats.retried_chunks:
            click.echo(f"slicetime: {count(stats.retried_chunks, 'chunk')} retried after a lost "
                       f"worker, {count(stats.lost_items, 'run')} lost twice", err=True)
        executor.close()


def _require_matplotlib(option: str) -> None:
    """Exit 2 with what to install when the optional drawing library is missing."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        raise UserError(f"{option} draws timing diagrams with matplotlib, which is not "
                        "installed: pip install matplotlib") from None


def _write_text(path: Path, text: str) -> None:
    from slicetime.readers.atomic import write_atomic

    try:
        write_atomic(path, text)
    except OSError as exc:
        raise UserError(f"{path}: cannot write the report: {exc.strerror or exc}") from None


# --------------------------------------------------------------------------- verify
@cli.command()
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


# --------------------------------------------------------------------------- correct
@cli.command()
@click.argument("paths", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--out", type=click.Path(path_type=Path, file_okay=False), required=True,
              help="Derivative dataset folder for the corrected runs (never inside an input "
              "dataset, except under its derivatives/).")
@click.option("--method", type=RegistryChoice(_engine_names),
              default="fourier", show_default=True, help="Temporal interpolation method.")
@click.option("--reference", "reference", default="middle", show_default=True,
              help="Time every slice is aligned to: seconds from the start of the volume "
              "(e.g. 1.0), 'first', 'middle' (halfway between the first and last excitation), "
              "'last', or 'slice:N' (the time of slice N, 0-based).")
@click.option("--desc", default="timealigned", show_default=True,
              help="Value of the desc- entity added to output names.")
@click.option("--keep-dtype", is_flag=True,
              help="Store the input's data type (rounded, clipped with a warning) instead of "
              "float32.")
@click.option("--force", is_flag=True,
              help="Correct runs whose audit has errors (never runs without slice timing).")
@click.option("--max-memory", "max_memory", default=None, metavar="SIZE",
              help="Keep the working memory under SIZE (e.g. 512M, 2G); larger runs are "
              "buffered in a scratch file under --out.")
@executor_options(default=JOBS_HEAVY, shared="Inputs and --out")
@policy_option("The audit that gates correction applies it.")
@click.option("--format", "fmt", type=click.Choice(["text", "json"]), default="text",
              show_default=True, help="Report format on stdout.")
@walking_options("correct")
@click.option("--mix-inputs", is_flag=True,
              help="Allow an --out folder that already holds outputs made from other input "
              "datasets (they are kept; a run whose output would replace one is refused).")
@friendly
def correct(
    paths: tuple[Path, ...],
    out: Path,
    method: str,
    reference: str,
    desc: str,
    keep_dtype: bool,
    force: bool,
    max_memory: str | None,
    jobs: int | None,
    scheduler: str | None,
    policy_file: Path | None,
    fmt: str,
    include_derivatives: bool,
    include_sourcedata: bool,
    include_hidden: bool,
    mix_inputs: bool,
) -> None:
    """Align every slice of the runs under PATHS to one reference time.

    \b
    Examples:
      slicetime correct ds/ --out ds/derivatives/slicetime
      slicetime correct ds/sub-01 --out aligned --method cubic --reference 1.0
    """
    from slicetime.engines.plan import ReferenceChoice
    from slicetime.interfaces.report_json import correct_object, dumps
    from slicetime.interfaces.safe_text import xml_safe
    from slicetime.interfaces.terminal import make_console, progress_reporter, render_correct
    from slicetime.pipelines.correct import CorrectInterrupted, CorrectOptions, correct_paths
    from slicetime.pipelines.memory import parse_size
    from slicetime.words import count

    try:
        choice = ReferenceChoice.parse(reference)
    except ValueError as exc:
        raise UserError(f"--reference: {exc}") from None
    cap = None
    if max_memory is not None:
        try:
            cap = parse_size(max_memory)
        except ValueError as exc:
            raise UserError(f"--max-memory: {exc}") from None
    options = CorrectOptions(out=out, method=method, reference=choice, desc=desc,
                             keep_dtype=keep_dtype, force=force, max_memory=cap, threads=0,
                             mix_inputs=mix_inputs)
    with _executor(jobs, scheduler, light=False) as executor, \
            progress_reporter("correcting") as progress:
        try:
            result = correct_paths(
                list(paths), options, progress=progress, policy_file=policy_file,
                include_derivatives=include_derivatives, include_sourcedata=include_sourcedata,
                include_hidden=include_hidden, executor=executor,
            )
        except CorrectInterrupted as stop:
            render_correct(stop.result, make_console(sys.stderr))
            click.echo(f"slicetime: interrupted; {count(stop.not_finished, 'run')} not finished "
                       "(rerun the same command to finish them)", err=True)
            sys.exit(130)
        except ValueError as exc:
            raise UserError(xml_safe(str(exc))) from None
        except OSError as exc:
            raise UserError(xml_safe(f"{out}: cannot write the outputs ({exc.strerror or exc})")
                            ) from None
    if fmt == "json":
        click.echo(dumps(correct_object(result)))
    else:
        render_correct(result, make_console())
    sys.exit(result.exit_code())


# --------------------------------------------------------------------------- fix
@cli.command()
@click.argument("paths", nargs=-1, type=click.Path(path_type=Path))
@click.option("--apply", "do_apply", is_flag=True,
              help="Write the changes (default: only show them). Each file is backed up first.")
@click.option("--backup-dir", type=click.Path(path_type=Path, file_okay=False),
              help="Where --apply keeps the originals and the journal (default: a "
              "<dataset>-slicetime-backups folder beside the dataset).")
@click.option("--undo", "undo_journal", type=click.Path(path_type=Path, dir_okay=False),
              help="Restore the files a journal (from an earlier --apply) records.")
@click.option("--plan", "plan_file", type=click.Path(path_type=Path, dir_okay=False),
              help="Without --apply: save the plan to this file. With --apply: apply exactly "
              "this saved plan (files changed since it was made are refused).")
@click.option("--per-run", is_flag=True,
              help="Write every repair into the run's own sidecar, never into an inherited one.")
@click.option("--consolidate", "consolidate", multiple=True, metavar="FIELD",
              help="Move FIELD, when every run of a task and acquisition has the same value in "
              "its own sidecar, into one top-level sidecar (repeatable).")
@click.option("--spread", "spread", multiple=True, metavar="FIELD",
              help="The reverse: copy FIELD from the shared sidecar that gives it into each "
              "run's own sidecar and remove it there (repeatable).")
@click.option("--replace-links", is_flag=True,
              help="Replace a sidecar that is a symbolic link (annexed) by a regular file "
              "instead of refusing it.")
@policy_option("Its expected protocols can rebuild missing timing.")
@executor_options(default=JOBS_LIGHT)
@source_options(switch=False, purpose="Used to rebuild timing from sourcedata/.")
@friendly
def fix(
    paths: tuple[Path, ...],
    do_apply: bool,
    backup_dir: Path | None,
    undo_journal: Path | None,
    plan_file: Path | None,
    per_run: bool,
    consolidate: tuple[str, ...],
    spread: tuple[str, ...],
    replace_links: bool,
    policy_file: Path | None,
    jobs: int | None,
    scheduler: str | None,
    source_map: Path | None,
) -> None:
    """Repair slice-timing metadata in sidecars: a dry run unless --apply.

    \b
    Exit status: 0 nothing to do (or everything applied / restored); 1 changes
    are planned (dry run) or some files were refused; 2 bad usage.
    \b
    Examples:
      slicetime fix ds/                    # show the planned changes as diffs
      slicetime fix ds/ --apply            # write them, with backups and a journal
      slicetime fix --undo ds-slicetime-backups/<UTC time>/journal.json
    \b
    Backups go to <dataset>-slicetime-backups/<UTC time stamp>/ beside the
    dataset (or --backup-dir); --apply prints the journal's exact path.
    """
    from slicetime.interfaces.safe_text import xml_safe
    from slicetime.interfaces.terminal import make_console, render_fix_plan
    from slicetime.pipelines import fix as fixing

    console = make_console()
    try:
        if undo_journal is not None:
            if paths or do_apply:
                raise UserError("--undo takes only the journal, no PATH and no --apply")
            _fix_undo(undo_journal)
        if do_apply and plan_file is not None:
            if paths:
                raise UserError("--apply --plan FILE applies the saved plan; give no PATH")
            plan = fixing.read_plan(plan_file)
        else:
            if not paths:
                raise UserError("fix: give the dataset or runs to repair (PATH...)")
            from slicetime.pipelines.audit import check_paths_hold_runs

            check_paths_hold_runs(list(paths))
            with _executor(jobs, scheduler) as executor:
                plan = fixing.plan_fix(list(paths), per_run=per_run, policy_file=policy_file,
                                       executor=executor, consolidate=consolidate,
                                       spread=spread,
                                       source=_source_options(None, source_map))
            # the dry run names what --apply would refuse (one refusal writes nothing)
            plan.notes.extend(f"--apply would refuse it, and then write nothing: {line}"
                              for line in fixing.preflight(plan, replace_links))
            render_fix_plan(plan, console)
        if not do_apply:
            if plan_file is not None:
                fixing.write_plan(plan, plan_file)
                click.echo(f"plan saved to {xml_safe(plan_file)}; apply it with: slicetime fix "
                           f"--apply --plan {xml_safe(plan_file)}")
            sys.exit(1 if plan.changes else 0)
        if not plan.changes:
            sys.exit(0)
        applied = fixing.apply_plan(plan, backup_dir=backup_dir, replace_links=replace_links)
    except fixing.FixError as exc:
        raise UserError(xml_safe(str(exc))) from None
    except OSError as exc:
        raise UserError(xml_safe(f"cannot write the backups or files ({exc.strerror or exc}); "
                                 "choose a writable --backup-dir")) from None
    for name in applied.written:
        click.echo(f"written   {xml_safe(name)}")
    for line in applied.refused:
        click.echo(f"refused   {xml_safe(line)}")
    if applied.refused:
        click.echo(f"nothing was written: {len(applied.refused)} of {len(plan.changes)} files "
                   "would be refused, and a plan is applied whole or not at all")
    if applied.journal is not None:
        click.echo(f"backups and journal: {xml_safe(applied.journal)}  (undo: slicetime fix "
                   f"--undo {xml_safe(applied.journal)})")
    left = (fixing.reaudit(plan, policy_file=policy_file,
                           source=_source_options(None, source_map))
            if applied.written else [])
    if left:
        for finding in left:
            click.echo(f"still     {xml_safe(finding.one_line())}")
    elif applied.written:
        click.echo("re-audit: the repaired runs are clean for the repaired codes")
    sys.exit(1 if applied.refused else 0)


def _fix_undo(journal: Path) -> None:
    """``fix --undo JOURNAL``: restore, then say exactly what was and was not done."""
    from slicetime.interfaces.safe_text import xml_safe
    from slicetime.pipelines import fix as fixing

    try:
        undone = fixing.undo(journal)
    except OSError as exc:
        raise UserError(xml_safe(f"{journal}: cannot undo ({exc.strerror or exc}); nothing "
                                 "was restored")) from None
    for name in undone.restored:
        click.echo(f"restored  {xml_safe(name)}")
    for name in undone.already:
        click.echo(f"unchanged {xml_safe(name)}  (already restored)")
    for name in undone.never_written:
        click.echo(f"unchanged {xml_safe(name)}  (never written: the apply stopped before it)")
    for line in undone.refused:
        click.echo(f"refused   {xml_safe(line)}")
    if undone.failure is not None:
        click.echo(f"slicetime: {xml_safe(undone.failure)}", err=True)
        sys.exit(2)
    sys.exit(1 if undone.refused else 0)


# --------------------------------------------------------------------------- timing
@cli.command()
@click.option("--slices", "n_slices", type=click.IntRange(min=1), required=True,
              help="Number of slices along the slice axis.")
@click.option("--tr", "tr", type=click.FloatRange(min=0, min_open=True),
              help="Repetition time in seconds.")
@click.option("--delay-time", "delay", type=click.FloatRange(min=0, min_open=True),
              metavar="SECONDS",
              help="BIDS DelayTime of a sparse protocol: the silent part at the end of each TR. "
              "The slices are spread over the rest (TR minus SECONDS); written as DelayTime.")
@click.option("--acquisition-time", "old_ta", hidden=True, default=None,
              help="Replaced by --delay-time (kept only to say so).")
@click.option("--order", type=click.Choice(["sequential", "interleaved"]), default="sequential",
              show_default=True, help="Order of excitation along the slice encoding direction.")
@click.option("--descending", is_flag=True,
              help="Acquire from the last slice (along the encoding direction) first.")
@click.option("--step", type=click.IntRange(min=2), default=2, show_default=True,
              help="Distance between successive slices of an interleaved order.")
@click.option("--first", "first", default=None, metavar="INDEX|auto",
              help="First slice acquired in an interleaved order, counted along the encoding "
              "direction from 0: one of the first STEP slices (0 to STEP-1; with --descending "
              "one of the last STEP excitation groups), each later pass starting one slice "
              "further; or 'auto': from 1 when the count is even, else from 0.")
@click.option("--multiband", type=click.IntRange(min=1), default=1, show_default=True,
              help="Multiband factor: slices excited together, spaced N/M apart.")
@click.option("--axis", "axis", type=click.Choice(["i", "j", "k", "i-", "j-", "k-"]),
              default="k", show_default=True,
              help="SliceEncodingDirection of the run the list is for.")
@click.option("--decimals", type=click.IntRange(min=0, max=9), default=4, show_default=True,
              help="Round the times to this many decimals.")
@click.option("--compact", is_flag=True,
              help="Print the fields as one line of JSON, ready to paste into a sidecar.")
@friendly
def timing(
    n_slices: int,
    tr: float | None,
    delay: float | None,
    old_ta: str | None,
    order: str,
    descending: bool,
    step: int,
    first: str | None,
    multiband: int,
    axis: str,
    decimals: int,
    compact: bool,
) -> None:
    """Print SliceTiming for a protocol, as JSON to paste into a sidecar.

    \b
    Examples:
      slicetime timing --slices 40 --tr 2 --order interleaved
      slicetime timing --slices 60 --tr 1 --multiband 4 --order interleaved --first auto
      slicetime timing --slices 16 --tr 3 --delay-time 1.5 --order interleaved  # sparse
    """
    from slicetime.numbers import plain
    from slicetime.schemes.generate import Protocol, array_times, slice_timing
    from slicetime.schemes.infer import infer_scheme

    if old_ta is not None:
        raise UserError("timing: --acquisition-time is replaced by --delay-time SECONDS, the "
                        "silent part of the TR (BIDS DelayTime): for slices spread over A "
                        "seconds of a TR of T seconds give --tr T --delay-time T-A")
    if tr is None:
        raise UserError("timing: give --tr (and --delay-time for sparse protocols)")
    for option, value in (("--tr", tr), ("--delay-time", delay)):
        if value is not None and value > _MS_LIKE_SECONDS:
            raise UserError(f"{option} {value:g}: times are in seconds, and {value:g} s looks "
                            f"like milliseconds; did you mean {option} {value / 1000:g}?")
    start: int | str | None = None
    if first is not None:
        if first == "auto":
            start = "auto"
        else:
            try:
                start = int(first)
            except ValueError:
                raise UserError(f"--first must be a slice index or 'auto', not {first!r}") \
                    from None
            if start < 0:
                raise UserError(f"--first must be a slice index (0 or more), not {first}")
    if delay is not None and delay >= tr:
        raise UserError(f"timing: --delay-time {plain(delay)} must be shorter than --tr "
                        f"{plain(tr)} (the slices are spread over the TR minus the delay)")
    active = None if delay is None else tr - delay
    protocol = Protocol(
        n_slices=n_slices,
        order=order,  # type: ignore[arg-type]  # click.Choice gave one of the Literal values
        ascending=not descending,
        step=step,
        start=start,  # type: ignore[arg-type]  # an int or "auto", checked above
        multiband=multiband,
        repetition_time=tr,
        active_time=active,
        direction="-" if axis.endswith("-") else "+",
        decimals=decimals,
    )
    try:
        times = slice_timing(protocol)
    except ValueError as exc:
        raise UserError(f"timing: {_as_options(str(exc))}") from None
    fields: dict[str, Any] = {"SliceTiming": times}
    fields["RepetitionTime"] = tr
    if delay is not None:
        fields["DelayTime"] = round(delay, decimals)
    fields["SliceEncodingDirection"] = axis
    if multiband > 1:
        fields["MultibandAccelerationFactor"] = multiband
    label = infer_scheme(array_times(protocol)).label
    click.echo(json.dumps(fields) if compact else json.dumps(fields, indent=2))
    click.echo(f"scheme in data-array order: {label}", err=True)


#: a TR or delay above this many seconds was written in milliseconds (the
#: audit's tr/units-ms uses the same bound)
_MS_LIKE_SECONDS = MAX_REPETITION_TIME
#: the protocol's parameter names and the options the user typed for them
_OPTION_OF = {
    "n_slices": "--slices",
    "repetition_time": "--tr",
    "active_time": "--delay-time",
    "start": "--first",
    "step": "--step",
    "multiband": "--multiband",
    "decimals": "--decimals",
}


def _as_options(message: str) -> str:
    """A protocol validation message with parameter names replaced by option names."""
    import re

    pattern = re.compile(r"(?<![\w-])(" + "|".join(_OPTION_OF) + r")(?= must|:|=| \()")
    message = message.replace("use order 'sequential'", "use --order sequential")
    return pattern.sub(lambda m: _OPTION_OF[m.group(1)], message)


# --------------------------------------------------------------------------- explain
@cli.command()
@click.argument("code", required=False)
@click.option("--list", "list_all", is_flag=True, help="List every finding code.")
@friendly
def explain(code: str | None, list_all: bool) -> None:
    """Print the documentation of a finding CODE (or --list them all)."""
    from slicetime.interfaces.screen import width_for, wrap_words
    from slicetime.rules import RULES
    from slicetime.rules import explain as explain_rule

    width = width_for(sys.stdout)
    if list_all or code is None:
        code_width = max(len(c) for c in RULES)
        lead = code_width + 2 + 7 + 2
        for rule in sorted(RULES.values(), key=lambda r: r.code):
            head = f"{rule.code:<{code_width}}  {rule.severity.value:<7}  "
            if width is not None and width - lead < 30:  # narrow: the title under the code
                click.echo(f"{rule.code}  {rule.severity.value}")
                for part in wrap_words(rule.title, width, first=4, rest=4):
                    click.echo("    " + part)
                continue
            parts = wrap_words(rule.title, width, first=lead, rest=lead)
            click.echo(head + parts[0])
            for part in parts[1:]:
                click.echo(" " * lead + part)
        return
    known = _known_code(code, RULES)
    if known is None:
        near = _close_codes(code, list(RULES))
        extra = f"; did you mean {', '.join(near)}?" if near else ""
        raise UserError(f"explain: no finding code {code!r}{extra} (see slicetime explain --list)")
    if known != code:
        click.echo(f"{code} is the former name of {known} (still accepted in lab policies)")
    for paragraph in explain_rule(known).split("\n"):
        hanging = 2 if paragraph.endswith(":") or ": " in paragraph[:24] else 0
        for i, part in enumerate(wrap_words(paragraph, width, rest=hanging)):
            click.echo(("" if i == 0 else " " * hanging) + part)


def _known_code(code: str, rules: Any) -> str | None:
    """The registered code ``code`` names: itself, or the code a former name became."""
    from slicetime.rules.registry import current_code

    current = current_code(code)
    return current if current in rules else None


def _close_codes(code: str, known: list[str]) -> list[str]:
    """Codes close to a mistyped one: spelling (difflib) after normalising case and
    separators, then codes containing its short name."""
    import difflib

    typed = code.strip().lower().replace("_", "-").replace(" ", "-").replace(".", "/")
    if typed in known:
        return [typed]
    short = typed.split("/")[-1]

    def score(candidate: str) -> float:
        ratio = difflib.SequenceMatcher(None, typed, candidate).ratio()
        return ratio + (1.0 if short and candidate.split("/")[-1] == short else 0.0)

    near = set(difflib.get_close_matches(typed, known, n=3, cutoff=0.6))
    near.update(c for c in known if short and c.split("/")[-1] == short)
    return sorted(near, key=lambda c: (-score(c), c))[:3]


# --------------------------------------------------------------------------- demo
@cli.command()
@click.option("--out", type=click.Path(path_type=Path, file_okay=False), default=Path(
    "demo-output"), show_default=True, help="Folder for the invented dataset and reports.")
@friendly
def demo(out: Path) -> None:
    """Run the whole job on a small invented study (audit, verify, fix, correct)."""
    from slicetime.interfaces.demo_tour import run_demo

    sys.exit(run_demo(out))


def main() -> None:
    cli(prog_name="slicetime")
