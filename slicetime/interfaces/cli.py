"""The ``slicetime`` command line: the group and ``main`` (the console entry point).

Each command lives in its own module of :mod:`slicetime.interfaces.commands`, and
is imported only when it runs or its help is shown: :data:`COMMANDS` names the
module of every command and keeps its one-line help for ``slicetime --help``, so
the group's help imports no command. The options several commands share, the
one-line errors and the exit codes are in :mod:`slicetime.interfaces.commands.shared`.
"""

from __future__ import annotations

import difflib
import importlib
import sys
from collections.abc import Sequence
from typing import Any

import click

from slicetime import __version__

#: every command: the module of :mod:`slicetime.interfaces.commands` that defines it
#: (a click command of the same name) and its one-line help in ``slicetime --help``
#: (the first sentence of its own help: a test keeps the two equal)
COMMANDS: dict[str, tuple[str, str]] = {
    "audit": ("audit", "Audit every run under PATHS (dataset roots, subject folders or run "
              "files)."),
    "correct": ("correct", "Align every slice of the runs under PATHS to one reference time."),
    "demo": ("demo", "Run the whole job on a small invented study (audit, verify, fix, "
             "correct)."),
    "explain": ("explain", "Print the documentation of a finding CODE (or --list them all)."),
    "fix": ("fix", "Repair slice-timing metadata in sidecars: a dry run unless --apply."),
    "pin": ("pin", "Write the protocol the runs under PATHS share as a lab policy (TOML)."),
    "show": ("show", "Show one run: its schedule, where each value came from, its scheme and "
             "findings."),
    "timing": ("timing", "Print SliceTiming for a protocol, as JSON to paste into a sidecar."),
    "verify": ("verify", "Check each run's claimed slice order against its own image data."),
}


class LazyGroup(click.Group):
    """A group that imports a command's module only when the command is looked up
    (to run it, show its help or complete it); its own help reads :data:`COMMANDS`."""

    def list_commands(self, ctx: click.Context) -> list[str]:
        return sorted({*self.commands, *COMMANDS})

    def get_command(self, ctx: click.Context | None, cmd_name: str) -> click.Command | None:
        command = self.commands.get(cmd_name)
        if command is None and cmd_name in COMMANDS:
            module = importlib.import_module(
                f"slicetime.interfaces.commands.{COMMANDS[cmd_name][0]}")
            command = getattr(module, cmd_name)
            assert isinstance(command, click.Command), cmd_name
            self.add_command(command, cmd_name)
        return command

    def resolve_command(self, ctx: click.Context, args: list[str]
                        ) -> tuple[str | None, click.Command | None, list[str]]:
        """The command ``args`` name; an unknown name is a usage error that suggests the
        nearest command (click suggests only options)."""
        name = args[0] if args else ""
        if args and self.get_command(ctx, name) is None and not name.startswith("-"):
            close = difflib.get_close_matches(name, self.list_commands(ctx), n=1)
            guess = f" (did you mean {close[0]!r}?)" if close else ""
            raise click.UsageError(f"no command {name!r}{guess}; {ctx.command_path} --help "
                                   "lists them", ctx)
        return super().resolve_command(ctx, args)

    def invoke(self, ctx: click.Context) -> Any:
        try:
            return super().invoke(ctx)
        except click.UsageError as exc:
            if exc.ctx is None:  # click's parser leaves some without (a missing value)
                exc.ctx = ctx  # the group's: usage_line adds the command being parsed
            raise

    def main(self, args: Sequence[str] | None = None, prog_name: str | None = None,
             complete_var: str | None = None, standalone_mode: bool = True,
             windows_expand_args: bool = True, **extra: Any) -> Any:
        """Click's entry point, with every usage mistake told in one line (the command,
        the option or argument and what is wrong with it, click's "did you mean" kept)
        and exit 2, instead of click's usage, help hint and error lines. ``--help`` and
        ``--version`` are click's own."""
        if not standalone_mode:  # a caller that handles click's exceptions itself
            return super().main(args, prog_name, complete_var, standalone_mode=False,
                                windows_expand_args=windows_expand_args, **extra)
        try:
            code = super().main(args, prog_name, complete_var, standalone_mode=False,
                                windows_expand_args=windows_expand_args, **extra)
        except click.exceptions.NoArgsIsHelpError as exc:  # no command: the help
            exc.show()
            sys.exit(exc.exit_code)
        except click.UsageError as exc:
            _say_error(usage_line(exc))
            sys.exit(exc.exit_code)
        except click.ClickException as exc:  # the commands' own one-line errors
            exc.show()
            sys.exit(exc.exit_code)
        except click.Abort:  # Ctrl-C (or end of input) before a command started
            _say_error("slicetime: interrupted before anything was done")
            sys.exit(130)
        sys.exit(code if isinstance(code, int) else 0)

    def format_commands(self, ctx: click.Context, formatter: click.HelpFormatter) -> None:
        """The command table of ``slicetime --help`` from the one-line helps of
        :data:`COMMANDS` (no command module imported): each summary whole, wrapped
        under itself when the terminal is narrow (click would cut it with "...")."""
        names = self.list_commands(ctx)
        if not names:
            return
        rows = [(name, COMMANDS[name][1]) for name in names if name in COMMANDS]
        with formatter.section("Commands"):
            formatter.write_dl(rows)


def usage_line(exc: click.UsageError) -> str:
    """A usage mistake as one line: the command it was made on, then click's message
    (which names the option, argument or file and keeps its "did you mean"), e.g.
    ``slicetime correct: invalid value for '--out': Directory 'x' is a file.``"""
    ctx = exc.ctx
    where = ctx.command_path if ctx is not None else "slicetime"
    if ctx is not None and isinstance(ctx.command, click.Group) and ctx.invoked_subcommand:
        where += f" {ctx.invoked_subcommand}"  # the mistake is in the command's options
    message = " ".join(exc.format_message().split())  # one line, whatever click wrote
    return f"{where}: {message[:1].lower()}{message[1:]}"


def _say_error(line: str) -> None:
    from slicetime.interfaces.screen import say

    say(line, err=True)


EXIT_STATUSES = """\b
Exit status (every command):
  0    nothing at or above --fail-on (audit, show), every run corrected or up
       to date (correct), nothing to fix or everything applied (fix), no
       verdict at or above --fail-on (verify)
  1    a finding at or above --fail-on (audit, show; also a file show cannot
       read), a run refused or failed (correct), changes planned, a fixable
       finding not planned, or files refused (fix), a verdict at or above
       --fail-on, by default a claim contradicted (verify)
  2    bad usage: an unknown option or value, a path that does not exist,
       holds no run or is no run (a .bval, an events table), an unreadable
       file or policy named on the command line, a missing optional part
       (e.g. matplotlib for --html)
  3    internal error (a bug: rerun with SLICETIME_DEBUG=1 and report it)
  130  interrupted (Ctrl-C)
\b
Shell completion (bash, zsh, fish): see README, "Shell completion", e.g.
  eval "$(_SLICETIME_COMPLETE=bash_source slicetime)"
"""


@click.group(cls=LazyGroup,
             context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100},
             epilog=EXIT_STATUSES)
@click.version_option(__version__, prog_name="slicetime")
def cli() -> None:
    """Audit, repair and correct fMRI slice timing across BIDS-style datasets."""


def main() -> None:
    cli(prog_name="slicetime")
