"""The command line composes: option groups shared by commands are declared once
(slicetime.interfaces.commands.shared: walking_options, executor_options, policy_option,
source_options) and choices come from the registries (formats, engines)."""

from __future__ import annotations

import click
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.interfaces.commands.shared import JOBS_AUDIT, JOBS_HEAVY, JOBS_LIGHT


def command_named(name: str) -> click.Command:
    command = cli.get_command(None, name)  # type: ignore[arg-type]  # click wants a context; the lazy group needs none
    assert command is not None, name
    return command


def option(command: str, name: str) -> click.Option:
    found = [p for p in command_named(command).params
             if isinstance(p, click.Option) and name in p.opts]
    assert len(found) == 1, (command, name)
    return found[0]


def names(command: str) -> set[str]:
    return {o for p in command_named(command).params for o in [*p.opts, *p.secondary_opts]}


GROUPS = {
    "walking": {"--include-derivatives", "--include-sourcedata", "--include-hidden"},
    "executor": {"--jobs", "--scheduler"},
    "policy": {"--policy"},
    "source": {"--source", "--no-source", "--source-map"},
}
#: which groups each command has (as before the groups were shared)
APPLIED = {
    "audit": {"walking", "executor", "policy", "source"},
    "correct": {"walking", "executor", "policy"},
    "fix": {"executor", "policy", "source"},  # --source/--no-source as for audit (issue 27)
    "show": {"policy"},
    "verify": {"executor"},
}


@pytest.mark.parametrize("command", sorted(APPLIED))
def test_each_command_keeps_its_option_groups(command: str) -> None:
    have = names(command)
    for group, options in GROUPS.items():
        if group in APPLIED[command]:
            assert options <= have, group
        else:
            assert not (options - {"--source-map"}) & have, group
    # fix keeps only --source-map of the source group
    assert ("--source-map" in have) is (command in ("audit", "fix"))


def test_a_shared_group_is_one_definition() -> None:
    # the same flag on two commands has the same type, default and behaviour
    for name in ("--include-derivatives", "--include-sourcedata", "--include-hidden"):
        a, c = option("audit", name), option("correct", name)
        assert (a.is_flag, a.default, a.name) == (c.is_flag, c.default, c.name)
        assert a.help and c.help and a.help.replace("audit", "correct") == c.help
    for command in ("audit", "correct", "fix"):
        jobs = option(command, "--jobs")
        assert isinstance(jobs.type, click.IntRange) and jobs.type.min == 1
        assert jobs.help is not None
        # the help names the command's own default
        default = {"correct": JOBS_HEAVY, "audit": JOBS_AUDIT}.get(command, JOBS_LIGHT)
        assert default in jobs.help
        assert option(command, "--scheduler").metavar == "ADDRESS"
    helps = {option(c, "--policy").help for c in ("show", "audit", "correct", "fix")}
    assert all(h and h.startswith("Lab policy (TOML).") for h in helps)
    assert {option(c, "--policy").name for c in ("show", "audit", "correct", "fix")} == {
        "policy_file"}


def test_format_and_method_choices_come_from_the_registries() -> None:
    from slicetime.engines.interpolate import ENGINES
    from slicetime.interfaces.report_stream import WRITERS

    fmt = option("audit", "--format").type
    assert isinstance(fmt, click.Choice)
    assert list(fmt.choices) == list(WRITERS)
    method = option("correct", "--method").type
    assert isinstance(method, click.Choice) and list(method.choices) == list(ENGINES)
    result = CliRunner().invoke(cli, ["audit", ".", "--format", "nope"])
    assert result.exit_code == 2
    assert all(name in result.output for name in WRITERS)


def test_the_group_loads_a_command_only_when_it_is_used() -> None:
    """``slicetime --help`` lists every command from the group's table without importing
    any command module; looking one command up imports its module alone (and the shared
    options)."""
    import subprocess
    import sys

    code = (
        "import sys\n"
        "from click.testing import CliRunner\n"
        "from slicetime.interfaces.cli import cli\n"
        "loaded = lambda: sorted(m.rsplit('.', 1)[1] for m in sys.modules\n"
        "                        if m.startswith('slicetime.interfaces.commands.'))\n"
        "out = CliRunner().invoke(cli, ['--help']).output\n"
        "print(loaded())\n"
        "cli.get_command(None, 'timing')\n"
        "print(loaded())\n"
        "print(out)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.split("\n")
    assert out[0] == "[]"
    assert out[1] == "['shared', 'timing']"
    help_text = "\n".join(out[2:])
    for name in ("audit", "correct", "demo", "explain", "fix", "show", "timing", "verify"):
        assert f"\n  {name} " in help_text, name
    assert "  timing   Print SliceTiming for a protocol" in help_text


def test_the_group_table_matches_each_command() -> None:
    """The one-line help kept in the group's table is the first sentence of the
    command's own help, and every command module is in the table."""
    from pathlib import Path

    from slicetime.interfaces import commands
    from slicetime.interfaces.cli import COMMANDS

    modules = {p.stem for p in Path(commands.__file__).parent.glob("*.py")} - {
        "__init__", "shared"}
    assert {module for module, _ in COMMANDS.values()} == modules
    for name, (_, short) in COMMANDS.items():
        command = command_named(name)
        assert command.name == name
        assert command.get_short_help_str(1000) == short, name


@pytest.mark.parametrize("columns", [80, 120])
def test_every_help_fits_the_terminal_and_no_summary_is_cut(columns: int) -> None:
    from slicetime.interfaces.cli import COMMANDS, cli

    runner = CliRunner(env={"COLUMNS": str(columns)})
    top = runner.invoke(cli, ["--help"], terminal_width=columns).output
    for name in ("", *COMMANDS):
        text = top if not name else runner.invoke(cli, [name, "--help"],
                                                  terminal_width=columns).output
        for line in text.splitlines():
            assert len(line) <= columns, (name, columns, line)
    # each command's summary whole in the table (wrapped, never cut with dots)
    flat = " ".join(top.split())
    for name, (_, short) in COMMANDS.items():
        assert f"{name} {short}" in flat, name
    assert "…" not in top
