"""``slicetime timing``: SliceTiming for a protocol, as JSON for a sidecar."""

from __future__ import annotations

import json
import math
from typing import Any

import click

from slicetime.interfaces.commands.shared import UserError, friendly, interruptible
from slicetime.interfaces.screen import say
from slicetime.model import MAX_REPETITION_TIME, MIN_REPETITION_TIME, implausible_repetition


@click.command()
@click.option("--slices", "n_slices", type=click.IntRange(min=1), required=True,
              help="Number of slices along the slice axis.")
@click.option("--tr", "tr", type=click.FloatRange(min=0, min_open=True),
              help="Repetition time in seconds.")
@click.option("--delay-time", "delay", type=click.FloatRange(min=0, min_open=True),
              metavar="SECONDS",
              help="BIDS DelayTime of a sparse protocol: the silent part at the end of each TR. "
              "The slices are spread over the rest (TR minus SECONDS); written as DelayTime.")
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
@interruptible("while the times were worked out or printed; timing writes no file (what "
               "was printed may be cut short)", "timing:start")
def timing(
    n_slices: int,
    tr: float | None,
    delay: float | None,
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
      slicetime timing --slices 60 --tr 1 --multiband 4 --order interleaved \\
          --first auto
      # sparse: slices spread over 1.5 s of a 3 s TR
      slicetime timing --slices 16 --tr 3 --delay-time 1.5 --order interleaved
    """
    from slicetime.numbers import as_written, plain
    from slicetime.schemes.generate import Protocol, array_times, slice_timing, timing_problem
    from slicetime.schemes.infer import infer_scheme
    from slicetime.schemes.resolve import repetition_time_unit

    if tr is None:
        raise UserError("timing: give --tr (and --delay-time for sparse protocols)")
    for option, value in (("--tr", tr), ("--delay-time", delay)):
        if value is None:
            continue
        if not math.isfinite(value):
            raise UserError(f"timing: {option} must be a finite number of seconds "
                            f"(got {value})")
        # the unit as the audit reads a sidecar TR (schemes.resolve), and the bounds
        # (model.implausible_repetition): neither is decided here again
        verdict = repetition_time_unit(value, "RepetitionTime")
        if not verdict.usable:
            raise UserError(f"timing: {option} {as_written(value)} is no plausible time, "
                            f"in seconds or read as milliseconds (a TR lies between "
                            f"{plain(MIN_REPETITION_TIME)} and {plain(MAX_REPETITION_TIME)} s)")
        problem = implausible_repetition(value) if option == "--tr" else None
        if problem is not None and verdict.unit == "s":
            raise UserError(f"timing: --tr {as_written(value)} is {problem}")
        if verdict.unit == "ms":
            raise UserError(f"timing: {option} {as_written(value)}: times are in seconds, "
                            f"and {as_written(value)} looks like milliseconds; did you mean "
                            f"{option} {plain(value / 1000)}?")
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
        problem = timing_problem(protocol)
        times = slice_timing(protocol)
    except ValueError as exc:
        raise UserError(f"timing: {_as_options(str(exc))}") from None
    if problem is not None:
        raise UserError(f"timing: {_as_options(problem)}")
    fields: dict[str, Any] = {"SliceTiming": times}
    fields["RepetitionTime"] = tr
    if delay is not None:
        fields["DelayTime"] = round(delay, decimals)
    fields["SliceEncodingDirection"] = axis
    if multiband > 1:
        fields["MultibandAccelerationFactor"] = multiband
    label = infer_scheme(array_times(protocol)).label
    click.echo(json.dumps(fields) if compact else json.dumps(fields, indent=2))
    say(f"scheme in data-array order: {label}", err=True)


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
