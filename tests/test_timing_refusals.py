"""``slicetime timing`` never prints a list the audit would read as another order."""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.schemes.generate import Protocol, slice_timing, timing_problem
from slicetime.schemes.infer import infer_scheme


def invoke(*args: str) -> tuple[int, str, str]:
    result = CliRunner().invoke(cli, ["timing", *args])
    return result.exit_code, result.stdout, result.stderr


@pytest.mark.parametrize(("args", "option"), [
    # 10 slices over 2 s are 0.2 s apart: whole seconds give [0,0,0,1,...,2] (the last at
    # the TR; BIDS: each SliceTiming value is below RepetitionTime)
    (("--slices", "10", "--tr", "2", "--decimals", "0"), "--decimals"),
    # 30000 slices over 2 s are 67 µs apart: 4 decimals (0.1 ms) cannot tell them apart
    (("--slices", "30000", "--tr", "2"), "--decimals"),
    # every slice in one group: no order at all
    (("--slices", "10", "--tr", "2", "--multiband", "10"), "--multiband"),
    # 0.25 ms apart: below the audit's grouping threshold (infer.MIN_SEPARATION)
    (("--slices", "200", "--tr", "0.05", "--decimals", "6"), "--slices"),
    # a TR no fMRI run has (model.implausible_repetition; the audit's tr/implausible
    # and correct's gate refuse it too)
    (("--slices", "3", "--tr", "0.001"), "--tr"),
])
def test_a_list_the_audit_rejects_is_refused(args: tuple[str, ...], option: str) -> None:
    code, out, err = invoke(*args)
    assert code == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and option in lines[0]


def test_rounding_that_keeps_the_order_is_accepted() -> None:
    # 10 slices over 2 s, 1 decimal: 0.0, 0.2, ..., 1.8 (arithmetic, no source needed)
    code, out, _ = invoke("--slices", "10", "--tr", "2", "--decimals", "1", "--compact")
    assert code == 0
    assert json.loads(out)["SliceTiming"] == [0.0, 0.2, 0.4, 0.6, 0.8, 1.0, 1.2, 1.4, 1.6, 1.8]


@pytest.mark.parametrize("protocol", [
    Protocol(n_slices=40, order="interleaved", repetition_time=2.0, decimals=4),
    Protocol(n_slices=60, order="interleaved", multiband=4, start="auto", repetition_time=1.0,
             decimals=4),
    Protocol(n_slices=1, repetition_time=2.0, decimals=4),
])
def test_every_accepted_list_reads_back_as_its_groups(protocol: Protocol) -> None:
    assert timing_problem(protocol) is None
    scheme = infer_scheme(slice_timing(protocol))
    assert len(scheme.groups) == protocol.n_groups
    assert max(slice_timing(protocol)) < protocol.repetition_time  # type: ignore[operator]


def test_a_refused_protocol_would_have_read_back_wrong() -> None:
    # the refusal agrees with the audit's reading: the printed list would group otherwise
    p = Protocol(n_slices=30000, repetition_time=2.0, decimals=4)
    assert timing_problem(p) is not None
    assert len(infer_scheme(slice_timing(p)).groups) != p.n_groups
