"""``slicetime correct PATHS --out DIR``: slice-time correction of every run."""

from __future__ import annotations

import contextlib
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import NoReturn

import click

from slicetime.interfaces.commands import shared
from slicetime.interfaces.commands.shared import UserError, friendly


def _engine_names() -> Sequence[str]:
    from slicetime.engines.interpolate import ENGINES

    return list(ENGINES)


@click.command()
@click.argument("paths", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--out", type=click.Path(path_type=Path, file_okay=False), required=True,
              help="Derivative dataset folder for the corrected runs (never inside an input "
              "dataset, except under its derivatives/).")
@click.option("--method", type=shared.RegistryChoice(_engine_names),
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
              help="Correct runs whose audit has errors that do not put the slice times in "
              "doubt (never runs without slice timing, with doubted timing, or that may not "
              "be interpolated).")
@click.option("--accept", "accepts", multiple=True, metavar="CODE[:PATTERN]",
              help="Correct despite a finding of CODE that puts the slice times in doubt, on "
              "the runs whose path (relative to the dataset root) matches PATTERN (default: "
              "every run). Repeatable; recorded in each output. The lab policy's [[accept]] "
              "does the same.")
@click.option("--verify", "verify_data", is_flag=True,
              help="Check each run's claimed slice order against its image data first; a "
              "contradicted claim puts the timing in doubt (slower).")
@click.option("--omit-leading", "omit_leading", type=click.IntRange(min=0), default=0,
              metavar="N", help="Leave the first N volumes out of the outputs (they still "
              "help interpolate the others); written as NumberOfVolumesDiscardedByUser.")
@click.option("--max-memory", "max_memory", default=None, metavar="SIZE",
              help="Keep the working memory under SIZE (e.g. 512M, 2G); larger runs are "
              "buffered in a scratch file under --out.")
@shared.executor_options(default=shared.JOBS_HEAVY, shared="Inputs and --out")
@shared.policy_option("The audit that gates correction applies it.")
@click.option("--format", "fmt", type=click.Choice(["text", "json"]), default="text",
              show_default=True, help="Report format on stdout.")
@click.option("--no-progress", is_flag=True, help="No progress bar or progress lines on stderr.")
@shared.walking_options("correct")
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
    accepts: tuple[str, ...],
    verify_data: bool,
    omit_leading: int,
    max_memory: str | None,
    jobs: int | None,
    scheduler: str | None,
    policy_file: Path | None,
    fmt: str,
    no_progress: bool,
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
    with shared.starting("correct"):
        from slicetime.engines.plan import ReferenceChoice
        from slicetime.interfaces.report_json import correct_object, dumps
        from slicetime.interfaces.safe_text import xml_safe
        from slicetime.interfaces.terminal import make_console, progress_reporter, render_correct
        from slicetime.pipelines.correct import CorrectOptions
        from slicetime.pipelines.correct_batch import correct_paths
        from slicetime.pipelines.memory import parse_size
        from slicetime.pipelines.signals import signals_noted, test_point
        from slicetime.rules.correction import parse_accept

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
        try:
            accepted = tuple(parse_accept(text) for text in accepts)
        except ValueError as exc:
            raise UserError(f"--accept: {exc}") from None
        options = CorrectOptions(out=out, method=method, reference=choice, desc=desc,
                                 keep_dtype=keep_dtype, force=force, max_memory=cap, threads=0,
                                 mix_inputs=mix_inputs, accepts=accepted,
                                 omit_leading=omit_leading)
    result = None
    late = False
    try:
        with shared.run_executor(jobs, scheduler, light=False) as executor, \
                (contextlib.nullcontext(None) if no_progress
                 else progress_reporter("correcting")) as progress:
            result = correct_paths(
                list(paths), options, progress=progress, policy_file=policy_file,
                include_derivatives=include_derivatives, include_sourcedata=include_sourcedata,
                include_hidden=include_hidden, executor=executor, verify=verify_data,
            )
            test_point("correct:closing")
    except KeyboardInterrupt as stop:
        if result is None:  # the batch was not done (CorrectInterrupted: partly)
            _interrupted(stop)
        late = True  # while the workers and the progress bar closed: the batch is done
    except ValueError as exc:
        raise UserError(xml_safe(str(exc))) from None
    except OSError as exc:
        raise UserError(xml_safe(f"{out}: cannot write the outputs ({exc.strerror or exc})")
                        ) from None
    assert result is not None
    with signals_noted() as noted:  # the batch is done: its summary is printed whole
        test_point("correct:summary")
        if fmt == "json":
            click.echo(dumps(correct_object(result)))
        else:
            render_correct(result, make_console())
    if late or noted or result.late_signal:
        shared.say_finished_despite_interrupt("the batch")
    sys.exit(result.exit_code())


def _interrupted(stop: KeyboardInterrupt) -> NoReturn:
    """Ctrl-C before the batch was done: what finished and what did not, exit 130 (a
    Ctrl-C during the audit that comes first says so in one line)."""
    from slicetime.interfaces.terminal import make_console, render_correct
    from slicetime.pipelines.correct_batch import CorrectInterrupted, NotStarted
    from slicetime.words import count

    if isinstance(stop, NotStarted):
        written = "nothing written" if stop.written is None else stop.written
        shared.interrupted(f"{stop.stage}, before any run was corrected; {written} (rerun "
                           "the same command)")
    if not isinstance(stop, CorrectInterrupted):  # the stages before the batch say more
        shared.interrupted("before any run was corrected; nothing written (rerun the same "
                           "command)")
    if not stop.result.runs:  # nothing finished: no summary of zero runs
        written = "nothing written" if stop.written is None else stop.written
        shared.interrupted(f"before any run was corrected; {written} "
                           f"({count(stop.not_finished, 'run')} to do: rerun the same command)")
    render_correct(stop.result, make_console(sys.stderr))
    them = "it" if stop.not_finished == 1 else "them"
    shared.interrupted(f"; {count(stop.not_finished, 'run')} not finished "
                       f"(rerun the same command to finish {them})")
