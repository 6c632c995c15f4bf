"""The command line composes: option groups shared by commands are declared once
(slicetime.interfaces.cli: walking_options, executor_options, policy_option,
source_options) and choices come from the registries (formats, engines)."""

from __future__ import annotations

import click
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import JOBS_AUDIT, JOBS_HEAVY, JOBS_LIGHT, cli


def option(command: str, name: str) -> click.Option:
    found = [p for p in cli.commands[command].params
             if isinstance(p, click.Option) and name in p.opts]
    assert len(found) == 1, (command, name)
    return found[0]


def names(command: str) -> set[str]:
    return {o for p in cli.commands[command].params for o in [*p.opts, *p.secondary_opts]}


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
    "fix": {"executor", "policy"},
    "show": {"policy"},
    "verify": set(),
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
