"""The ``slicetime`` command line. Thin: parse, call a pipeline, render.

Exit codes (contract): 0 nothing at or above ``--fail-on``; 1 findings at or
above it; 2 bad usage or unreadable input given explicitly. A user's mistake
or a bad file never produces a traceback: it is one line on stderr.
"""

from __future__ import annotations

import contextlib
import functools
import json
import os
import sys
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any, TypeVar

import click

from slicetime import __version__

F = TypeVar("F", bound=Callable[..., Any])

EXIT_FINDINGS = 1
EXIT_USAGE = 2
EXIT_INTERNAL = 3


class UserError(click.ClickException):
    """A one-line problem with what the user asked for (exit 2)."""

    exit_code = EXIT_USAGE

    def show(self, file: Any = None) -> None:
        click.echo(f"slicetime: {self.format_message()}", err=True)


def friendly(fn: F) -> F:
    """Turn reader errors into one-line messages and unexpected crashes into exit 3."""

    @functools.wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        from slicetime.readers.errors import ReadError

        try:
            return fn(*args, **kwargs)
        except ReadError as exc:
            raise UserError(exc.message) from None
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

    return wrapper  # type: ignore[return-value]


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(__version__, prog_name="slicetime")
def cli() -> None:
    """Audit, repair and correct fMRI slice timing across BIDS-style datasets."""


# --------------------------------------------------------------------------- show
@cli.command()
@click.argument("file", type=click.Path(path_type=Path))
@click.option("--json", "as_json", is_flag=True, help="Print the run object of the JSON report.")
@friendly
def show(file: Path, as_json: bool) -> None:
    """Show one run: its schedule, where each value came from, its scheme and findings."""
    from slicetime.interfaces.report_json import dumps, run_object
    from slicetime.interfaces.terminal import make_console, render_show
    from slicetime.pipelines.audit import audit_one
    from slicetime.readers.dataset import find_root
    from slicetime.readers.errors import check_regular_file

    check_regular_file(file, str(file), what="image")
    root = find_root(file.resolve().parent if not file.is_dir() else file)
    run = audit_one(root, file.absolute() if not file.is_absolute() else file)
    if as_json:
        click.echo(dumps(run_object(run)))
    else:
        render_show(run, make_console())


# --------------------------------------------------------------------------- audit
@cli.command()
@click.argument("paths", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--format", "fmt", type=click.Choice(["text", "json", "junit"]), default="text",
              show_default=True, help="Report format on stdout (or --output).")
@click.option("--output", type=click.Path(path_type=Path, dir_okay=False),
              help="Write the report to this file instead of stdout.")
@click.option("--html", "html_file", type=click.Path(path_type=Path, dir_okay=False),
              help="Also write a self-contained HTML report with timing diagrams to this "
              "file (works offline; any --format still goes to stdout or --output).")
@click.option("--fail-on", type=click.Choice(["error", "warning", "never"]), default="error",
              show_default=True, help="Exit 1 when a finding reaches this severity.")
@click.option("--hide-notes", is_flag=True, help="Leave notes out of the text report.")
@click.option("--include-derivatives", is_flag=True, help="Also audit derivatives/.")
@click.option("--include-sourcedata", is_flag=True, help="Also audit sourcedata/.")
@click.option("--include-hidden", is_flag=True, help="Also audit hidden folders and files.")
@click.option("--jobs", type=click.IntRange(min=1), default=None,
              help="Local worker processes (default: the CPUs available; one on machines with 2 or "
              "fewer).")
@click.option("--scheduler", metavar="ADDRESS",
              help="Run on a Dask cluster: the address of its scheduler (tcp://host:8786). "
              "Files must be on a file system the workers share.")
@click.option("--policy", "policy_file", type=click.Path(path_type=Path, dir_okay=False),
              help="Lab policy (TOML). Default: slicetime-policy.toml at the dataset root.")
@click.option("--verify", "verify_data", is_flag=True,
              help="Also read each run's image data and check its slice order against it "
              "(a verify/* finding per run; slower: see 'slicetime verify').")
@friendly
def audit(
    paths: tuple[Path, ...],
    fmt: str,
    output: Path | None,
    html_file: Path | None,
    fail_on: str,
    hide_notes: bool,
    include_derivatives: bool,
    include_sourcedata: bool,
    include_hidden: bool,
    jobs: int | None,
    scheduler: str | None,
    policy_file: Path | None,
    verify_data: bool,
) -> None:
    """Audit every run under PATHS (dataset roots, subject folders or run files)."""
    from slicetime.interfaces.report_json import audit_object, dumps
    from slicetime.interfaces.terminal import make_console, progress_reporter, render_audit
    from slicetime.pipelines.audit import audit_paths
    from slicetime.pipelines.executor import Interrupted

    with _executor(jobs, scheduler, light=not verify_data) as executor, \
            progress_reporter("auditing") as progress:
        try:
            result = audit_paths(
                list(paths),
                include_derivatives=include_derivatives,
                include_sourcedata=include_sourcedata,
                include_hidden=include_hidden,
                progress=progress,
                policy_file=policy_file,
                executor=executor,
                verify=verify_data,
            )
        except Interrupted as stop:
            finished = sum(1 for r in stop.results if r is not None)
            click.echo(f"slicetime: interrupted; {finished} of {len(stop.results)} runs "
                       "audited, no report written", err=True)
            sys.exit(130)
    root_given = str(paths[0]) if len(paths) == 1 else " ".join(str(p) for p in paths)
    if html_file is not None:
        from slicetime.interfaces.report_html import write_html

        try:
            write_html(result, html_file, root_given=root_given)
        except OSError as exc:
            raise UserError(f"{html_file}: cannot write the HTML report: "
                            f"{exc.strerror or exc}") from None
    if fmt == "json":
        text = dumps(audit_object(result, root_given)) + "\n"
        if output:
            _write_text(output, text)
        else:
            click.echo(text, nl=False)
    elif fmt == "junit":
        from slicetime.interfaces.report_junit import junit_xml

        text = junit_xml(result, fail_on=fail_on, root_given=root_given)
        if output:
            _write_text(output, text)
        else:
            click.echo(text, nl=False)
    else:
        if output:
            with open(output, "w", encoding="utf-8") as fh:
                render_audit(result, make_console(fh), show_notes=not hide_notes)
        else:
            render_audit(result, make_console(), show_notes=not hide_notes)
    sys.exit(result.exit_code(fail_on))


@contextlib.contextmanager
def _executor(jobs: int | None, scheduler: str | None, *, light: bool = True) -> Iterator[Any]:
    """The executor the options ask for; a note on stderr of where the work ran.
    ``light``: header-only work per run (audit, fix), see ``make_executor``."""
    from slicetime.pipelines.executor import ExecutorError, make_executor

    try:
        executor = make_executor(jobs, scheduler, light=light)
    except ExecutorError as exc:
        raise UserError(str(exc)) from None
    try:
        yield executor
    finally:
        stats = executor.stats
        if executor.name == "dask":
            click.echo(f"slicetime: ran on {len(stats.workers)} Dask worker(s) of "
                       f"{scheduler}", err=True)
        if stats.retried_chunks:
            click.echo(f"slicetime: {stats.retried_chunks} chunk(s) retried after a lost "
                       f"worker, {stats.lost_items} run(s) lost twice", err=True)
        executor.close()


def _write_text(path: Path, text: str) -> None:
    try:
        tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, path)
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
    from slicetime.interfaces.report_json import dumps
    from slicetime.pipelines.verify import verify_run
    from slicetime.readers.dataset import find_root
    from slicetime.readers.errors import ReadError, check_regular_file

    outcomes = []
    unreadable: list[dict[str, str]] = []
    for file in files:
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
    verdicts = [o.finding.code.split("/")[1] for o in outcomes]
    if fmt == "json":
        click.echo(dumps({
            "tool": {"name": "slicetime", "version": __version__},
            "runs": [{"path": o.path, "verdict": o.finding.code.split("/")[1],
                      "finding": o.finding.to_json(),
                      "units": [f.to_json() for f in o.units]} for o in outcomes],
            "unreadable": unreadable,
            "summary": {v: verdicts.count(v) for v in ("supported", "consistent",
                                                       "contradicted", "undecidable")},
        }))
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
@click.option("--method", type=click.Choice(["fourier", "sinc", "cubic", "linear"]),
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
@click.option("--jobs", type=click.IntRange(min=1), default=None,
              help="Runs corrected at once in local processes (default: the CPUs "
              "available; memory grows with each).")
@click.option("--scheduler", metavar="ADDRESS",
              help="Run on a Dask cluster: the address of its scheduler (tcp://host:8786). "
              "Inputs and --out must be on a file system the workers share.")
@click.option("--policy", "policy_file", type=click.Path(path_type=Path, dir_okay=False),
              help="Lab policy (TOML) used by the audit that gates correction.")
@click.option("--format", "fmt", type=click.Choice(["text", "json"]), default="text",
              show_default=True, help="Report format on stdout.")
@click.option("--include-derivatives", is_flag=True, help="Also correct runs in derivatives/.")
@click.option("--include-sourcedata", is_flag=True, help="Also correct runs in sourcedata/.")
@click.option("--include-hidden", is_flag=True, help="Also correct hidden folders and files.")
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
) -> None:
    """Align every slice of the runs under PATHS to one reference time.

    \b
    Examples:
      slicetime correct ds/ --out ds/derivatives/slicetime
      slicetime correct ds/sub-01 --out aligned --method cubic --reference 1.0
    """
    from slicetime.engines.plan import ReferenceChoice
    from slicetime.interfaces.report_json import dumps
    from slicetime.interfaces.terminal import make_console, progress_reporter, render_correct
    from slicetime.pipelines.correct import (
        CorrectInterrupted,
        CorrectOptions,
        correct_paths,
        parse_size,
    )

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
                             keep_dtype=keep_dtype, force=force, max_memory=cap, threads=0)
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
            click.echo(f"slicetime: interrupted; {stop.not_finished} run(s) not finished "
                       "(rerun the same command to finish them)", err=True)
            sys.exit(130)
        except ValueError as exc:
            raise UserError(str(exc)) from None
        except OSError as exc:
            raise UserError(f"{out}: cannot write the outputs ({exc.strerror or exc})") from None
    if fmt == "json":
        payload = {
            "tool": {"name": "slicetime", "version": __version__},
            "out": result.out,
            "runs": [r.to_json() for r in result.runs],
            "summary": result.counts(),
        }
        click.echo(dumps(payload))
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
@click.option("--policy", "policy_file", type=click.Path(path_type=Path, dir_okay=False),
              help="Lab policy (TOML); its expected protocols can rebuild missing timing.")
@click.option("--jobs", type=click.IntRange(min=1), default=None,
              help="Local worker processes for the audit (default: the CPUs available; one "
              "on machines with 2 or fewer).")
@click.option("--scheduler", metavar="ADDRESS", help="Audit on a Dask cluster.")
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
) -> None:
    """Repair slice-timing metadata in sidecars: a dry run unless --apply.

    \b
    Exit status: 0 nothing to do (or everything applied / restored); 1 changes
    are planned (dry run) or some files were refused; 2 bad usage.
    \b
    Examples:
      slicetime fix ds/                    # show the planned changes as diffs
      slicetime fix ds/ --apply            # write them, with backups and a journal
      slicetime fix --undo ds-slicetime-backups/20261201T120000Z/journal.json
    """
    from slicetime.interfaces.terminal import make_console, render_fix_plan
    from slicetime.pipelines import fix as fixing

    console = make_console()
    try:
        if undo_journal is not None:
            if paths or do_apply:
                raise UserError("--undo takes only the journal, no PATH and no --apply")
            undone = fixing.undo(undo_journal)
            for name in undone.restored:
                click.echo(f"restored  {name}")
            for line in undone.refused:
                click.echo(f"refused   {line}")
            sys.exit(1 if undone.refused else 0)
        if do_apply and plan_file is not None:
            if paths:
                raise UserError("--apply --plan FILE applies the saved plan; give no PATH")
            plan = fixing.read_plan(plan_file)
        else:
            if not paths:
                raise UserError("fix: give the dataset or runs to repair (PATH...)")
            with _executor(jobs, scheduler) as executor:
                plan = fixing.plan_fix(list(paths), per_run=per_run, policy_file=policy_file,
                                       executor=executor, consolidate=consolidate,
                                       spread=spread)
            render_fix_plan(plan, console)
    except fixing.FixError as exc:
        raise UserError(str(exc)) from None
    if not do_apply:
        if plan_file is not None:
            fixing.write_plan(plan, plan_file)
            click.echo(f"plan saved to {plan_file}; apply it with: slicetime fix --apply "
                       f"--plan {plan_file}")
        sys.exit(1 if plan.changes else 0)
    if not plan.changes:
        sys.exit(0)
    try:
        applied = fixing.apply_plan(plan, backup_dir=backup_dir, replace_links=replace_links)
    except OSError as exc:
        raise UserError(f"cannot write the backups or files ({exc.strerror or exc}); choose "
                        "a writable --backup-dir") from None
    for name in applied.written:
        click.echo(f"written   {name}")
    for line in applied.refused:
        click.echo(f"refused   {line}")
    if applied.journal is not None:
        click.echo(f"backups and journal: {applied.journal}  (undo: slicetime fix --undo "
                   f"{applied.journal})")
    left = fixing.reaudit(plan)
    if left:
        for finding in left:
            click.echo(f"still     {finding.one_line()}")
    elif applied.written:
        click.echo("re-audit: the repaired runs are clean for the repaired codes")
    sys.exit(1 if applied.refused else 0)


# --------------------------------------------------------------------------- timing
@cli.command()
@click.option("--slices", "n_slices", type=click.IntRange(min=1), required=True,
              help="Number of slices along the slice axis.")
@click.option("--tr", "tr", type=click.FloatRange(min=0, min_open=True),
              help="Repetition time in seconds.")
@click.option("--acquisition-time", "ta", type=click.FloatRange(min=0, min_open=True),
              help="Time over which the slices are spread, when shorter than the TR "
              "(sparse protocols). Defaults to the TR.")
@click.option("--order", type=click.Choice(["sequential", "interleaved"]), default="sequential",
              show_default=True, help="Order of excitation along the slice encoding direction.")
@click.option("--descending", is_flag=True,
              help="Acquire from the last slice (along the encoding direction) first.")
@click.option("--step", type=click.IntRange(min=2), default=2, show_default=True,
              help="Distance between successive slices of an interleaved order.")
@click.option("--first", "first", default=None,
              help="First slice acquired in an interleaved order (a slice index), or 'auto': "
              "from 1 when the count is even, else from 0.")
@click.option("--multiband", type=click.IntRange(min=1), default=1, show_default=True,
              help="Multiband factor: slices excited together, spaced N/M apart.")
@click.option("--axis", "axis", type=click.Choice(["i", "j", "k", "i-", "j-", "k-"]),
              default="k", show_default=True,
              help="SliceEncodingDirection of the run the list is for.")
@click.option("--decimals", type=click.IntRange(min=0, max=9), default=4, show_default=True,
              help="Round the times to this many decimals.")
@friendly
def timing(
    n_slices: int,
    tr: float | None,
    ta: float | None,
    order: str,
    descending: bool,
    step: int,
    first: str | None,
    multiband: int,
    axis: str,
    decimals: int,
) -> None:
    """Print SliceTiming for a protocol, as JSON to paste into a sidecar.

    \b
    Examples:
      slicetime timing --slices 40 --tr 2 --order interleaved
      slicetime timing --slices 60 --tr 1 --multiband 4 --order interleaved --first auto
    """
    from slicetime.schemes.generate import Protocol, array_times, slice_timing
    from slicetime.schemes.infer import infer_scheme

    if tr is None and ta is None:
        raise UserError("timing: give --tr (and --acquisition-time for sparse protocols)")
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
    protocol = Protocol(
        n_slices=n_slices,
        order=order,  # type: ignore[arg-type]
        ascending=not descending,
        step=step,
        start=start,  # type: ignore[arg-type]
        multiband=multiband,
        repetition_time=tr,
        acquisition_time=ta,
        direction="-" if axis.endswith("-") else "+",
        decimals=decimals,
    )
    try:
        times = slice_timing(protocol)
    except ValueError as exc:
        raise UserError(f"timing: {exc}") from None
    fields: dict[str, Any] = {"SliceTiming": times}
    if tr is not None:
        fields["RepetitionTime"] = tr
    if ta is not None and tr is not None and ta < tr:
        fields["DelayTime"] = round(tr - ta, decimals)
    fields["SliceEncodingDirection"] = axis
    if multiband > 1:
        fields["MultibandAccelerationFactor"] = multiband
    label = infer_scheme(array_times(protocol)).label
    click.echo(json.dumps(fields, indent=2))
    click.echo(f"scheme in data-array order: {label}", err=True)


# --------------------------------------------------------------------------- explain
@cli.command()
@click.argument("code", required=False)
@click.option("--list", "list_all", is_flag=True, help="List every finding code.")
@friendly
def explain(code: str | None, list_all: bool) -> None:
    """Print the documentation of a finding CODE (or --list them all)."""
    from slicetime.rules import RULES
    from slicetime.rules import explain as explain_rule

    if list_all or code is None:
        width = max(len(c) for c in RULES)
        for rule in sorted(RULES.values(), key=lambda r: r.code):
            click.echo(f"{rule.code:<{width}}  {rule.severity.value:<7}  {rule.title}")
        return
    if code not in RULES:
        near = [c for c in RULES if code.split("/")[-1] in c]
        extra = f"; did you mean {', '.join(sorted(near)[:3])}?" if near else ""
        raise UserError(f"explain: no finding code {code!r}{extra} (see slicetime explain --list)")
    click.echo(explain_rule(code))


# --------------------------------------------------------------------------- demo
@cli.command()
@click.option("--out", type=click.Path(path_type=Path, file_okay=False), default=Path(
    "demo-output"), show_default=True, help="Folder for the invented dataset and reports.")
@friendly
def demo(out: Path) -> None:
    """Run the whole job on a small invented study (audit, verify, fix, correct)."""
    from slicetime.pipelines.demo import run_demo

    sys.exit(run_demo(out))


def main() -> None:
    cli(prog_name="slicetime")
