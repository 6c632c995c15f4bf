"""What the commands share: option groups declared once, the lazy registry choice,
the one-line error (exit 2) and the crash guard, and the executor and source
cross-check the options ask for.

Exit codes (contract): 0 nothing at or above ``--fail-on``; 1 findings at or
above it; 2 bad usage or unreadable input given explicitly. A user's mistake
or a bad file never produces a traceback: it is one line on stderr.
"""

from __future__ import annotations

import contextlib
import functools
import os
import sys
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any, Literal, NoReturn, TypeVar

import click

from slicetime.interfaces.entry import EXIT_INTERRUPTED as ENTRY_EXIT_INTERRUPTED
from slicetime.interfaces.entry import STARTING
from slicetime.interfaces.screen import say

F = TypeVar("F", bound=Callable[..., Any])

EXIT_FINDINGS = 1
EXIT_USAGE = 2
EXIT_INTERNAL = 3
#: 128 + SIGINT's number 2, as a shell reports a process a Ctrl-C ended (the entry
#: point's, which it needs before click loads)
EXIT_INTERRUPTED = ENTRY_EXIT_INTERRUPTED


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


def former_spelling(old: str, new: str) -> None:
    """The notice (on standard error, so a JSON document on standard output stays
    clean) that an option was used under the spelling of an earlier release, which is
    read, hidden from help, until the next release (DEVELOPERS.md, "Option names")."""
    say(f"slicetime: {old} is now spelt {new}; the former spelling is read until "
        "the next release", err=True)


#: what ``--jobs`` defaults to (``pipelines.executor.make_executor``): header-only work
#: (audit, fix) and work that reads image data (correct)
JOBS_LIGHT = ("one per CPU; a single process on a machine with 1 or 2 CPUs, where more "
              "would be slower")
JOBS_AUDIT = ("one per CPU; on a machine with 1 or 2 CPUs, a single process unless the "
              "machine is idle and there are 500 runs or more")
JOBS_HEAVY = "one per CPU; each needs memory for a run of its own"


def executor_options(*, default: str, shared: str = "Files") -> Callable[[F], F]:
    """``--jobs`` and ``--scheduler``: where the runs are processed. ``default`` names
    the command's default for ``--jobs`` (:data:`JOBS_LIGHT`, :data:`JOBS_AUDIT`,
    :data:`JOBS_HEAVY`); ``shared``: what the Dask workers must see."""
    return _options(
        click.option("--jobs", type=click.IntRange(min=1), default=None,
                     metavar="N",
                     help=f"Use N worker processes on this machine. Default: {default}."),
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
    with the DICOM series under sourcedata/ (:func:`source_settings` reads them)."""
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


def say_finished_despite_interrupt(work: str) -> None:
    """The line for a Ctrl-C (or SIGTERM) that arrived after ``work`` was done, while
    its records were written or its summary printed: it was noted, not obeyed, so the
    command finished and exits as it would have (``pipelines.signals``)."""
    say(f"slicetime: Ctrl-C came after {work} was done; it finished as reported above",
        err=True)


def interrupted(what: str) -> NoReturn:
    """Ctrl-C: the one line saying where the command was and what was and was not
    written (``what``: "while ...", "before ...", or "; ..." when the rest says it),
    exit 130."""
    say(f"slicetime: interrupted{'' if what.startswith(';') else ' '}{what}", err=True)
    sys.exit(EXIT_INTERRUPTED)


@contextlib.contextmanager
def on_interrupt(what: str, point: str | None = None) -> Iterator[None]:
    """A Ctrl-C inside the block ends the command with :func:`interrupted` (``what``).
    An interrupt that carries its own account (the executor's ``Interrupted``, a
    transaction's) is caught inside the block, before this. ``point``: the tests' hook
    (``pipelines.signals.test_point``) as the block starts."""
    from slicetime.pipelines.signals import test_point

    try:
        if point is not None:
            test_point(point)
        yield
    except KeyboardInterrupt:
        interrupted(what)


def starting(command: str) -> contextlib.AbstractContextManager[None]:
    """A command's start (its imports, its options read and checked), before its first
    stage that tells a Ctrl-C itself: nothing is written there, and a Ctrl-C says so,
    not :func:`friendly`'s "what was written, if anything, is not known". The tests'
    hook is ``<command>:start``."""
    return on_interrupt(STARTING, f"{command}:start")


def interruptible(what: str, point: str | None = None) -> Callable[[F], F]:
    """A command whose every Ctrl-C not told more precisely inside ends with
    :func:`interrupted` (``what``): for commands that write no file, or as the outer
    line under the stages they tell themselves. Placed under ``@friendly``."""

    def decorate(fn: F) -> F:
        @functools.wraps(fn)
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            with on_interrupt(what, point):
                return fn(*args, **kwargs)

        return wrapper  # type: ignore[return-value]  # functools.wraps keeps the signature

    return decorate


class UserError(click.ClickException):
    """A one-line problem with what the user asked for (exit 2)."""

    exit_code = EXIT_USAGE

    def show(self, file: Any = None) -> None:
        say(f"slicetime: {self.format_message()}", err=True)


def friendly(fn: F) -> F:
    """Turn reader errors into one-line messages and unexpected crashes into exit 3."""

    @functools.wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        from slicetime.pipelines.errors import NoRunsError
        from slicetime.readers.atomic import WriteRefused
        from slicetime.readers.errors import ReadError

        try:
            return fn(*args, **kwargs)
        except ReadError as exc:
            raise UserError(exc.message) from None
        except WriteRefused as exc:
            from slicetime.interfaces.safe_text import xml_safe

            raise UserError(xml_safe(str(exc))) from None
        except NoRunsError as exc:
            raise UserError(str(exc)) from None
        except (click.ClickException, click.exceptions.Exit, click.Abort, SystemExit):
            raise
        except KeyboardInterrupt:  # a command that did not say where it was (none should)
            interrupted("(what was written, if anything, is not known)")
        except BrokenPipeError:
            sys.exit(0)
        except Exception as exc:  # a bug: keep the user's terminal clean, allow debugging
            if os.environ.get("SLICETIME_DEBUG"):
                raise
            say(f"slicetime: internal error ({type(exc).__name__}: {exc}); "
                "rerun with SLICETIME_DEBUG=1 for the traceback and please report it",
                err=True)
            sys.exit(EXIT_INTERNAL)

    return wrapper  # type: ignore[return-value]  # functools.wraps keeps the signature


def source_settings(check: bool | None, source_map: Path | None) -> Any:
    """The source cross-check the options ask for (a bad map file: exit 2)."""
    from slicetime.readers.source import SourceOptions, load_source_map

    mapping = load_source_map(source_map) if source_map is not None else {}
    mode: Literal["auto", "on", "off"] = (
        "off" if check is False else "on" if check or mapping else "auto")
    return SourceOptions(mode=mode, mapping=mapping)


@contextlib.contextmanager
def run_executor(jobs: int | None, scheduler: str | None, *, light: bool = True,
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
            of = (f" of the {stats.cluster_workers} at {scheduler}"
                  if stats.cluster_workers is not None else f" at {scheduler}")
            say(f"slicetime: ran on {count(len(stats.workers), 'Dask worker')}{of}",
                err=True)
        if stats.retried_chunks:
            say(f"slicetime: {count(stats.retried_chunks, 'chunk')} retried after a lost "
                f"worker, {count(stats.lost_items, 'run')} lost twice", err=True)
        executor.close()
