"""A seeded fuzz suite over every input the tool reads (issue 26, item 9).

Each case copies a small study, damages one input (a sidecar, a header, a gzip
stream, a file name, a DICOM file, a policy, a source map, a plan, a journal) with
a seeded generator, runs a command in process and asserts, whatever the input:

* no traceback and no exit 3 (an internal error): every bad input is a one-line
  message or a finding;
* no hang: each command must return within ``DEADLINE`` seconds (a timer interrupts
  it otherwise);
* no write outside the allowed places: every file of the case outside them (a
  "victim" folder beside the study, the study itself for read-only commands) has
  the same bytes afterwards, and no file appears there.

The seed is fixed (``SEED``), so CI runs the same few hundred cases every time;
``SLICETIME_FUZZ_SEED=<n>`` runs another set locally, and a failure names its seed
and case number.
"""

from __future__ import annotations

import gzip
import json
import os
import random
import shutil
import signal
import string
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from tests.helpers_bids import tree_hashes, write_json, write_sidecar
from tests.test_adversarial_fix import ms_dataset
from tests.test_dicom_source import classic_series

SEED = int(os.environ.get("SLICETIME_FUZZ_SEED", "26"))
DEADLINE = 20.0  # seconds for one command on a 2-run study (each takes well under one)
EXIT_INTERNAL = 3
RUN = "sub-01/func/sub-01_task-hum_bold.nii.gz"

pytestmark = pytest.mark.skipif(not hasattr(signal, "setitimer"),
                                reason="the deadline needs POSIX interval timers")


class Hang(BaseException):
    """Raised by the timer in the command's thread: it ran past the deadline."""


# ---------------------------------------------------------------------------- the study


@dataclass
class Case:
    """One fuzz case: its folder, the command's arguments and the allowed places."""

    root: Path
    args: list[str] = field(default_factory=list)
    allowed: list[str] = field(default_factory=list)  # folder names under root

    @property
    def ds(self) -> Path:
        return self.root / "ds"


@pytest.fixture(scope="module")
def base(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The study every case starts from: two runs with millisecond SliceTiming (so
    fix has a plan), a shared sidecar, a DICOM series under sourcedata/, a plan file,
    an applied copy with its backups and journal, and a victim folder."""
    return build_base(tmp_path_factory.mktemp("fuzz-base"))


def build_base(top: Path) -> Path:
    """The study of :func:`base` in ``top``."""
    ds = ms_dataset(top / "ds")
    write_sidecar(ds, "task-hum_bold.json", {"TaskName": "hum", "RepetitionTime": 2.0})
    classic_series(ds / "sourcedata" / "sub-01" / "func", [0.0, 0.5, 1.0, 1.5], volumes=1)
    victim = top / "victim"
    victim.mkdir()
    (victim / "precious.json").write_text('{"keep": true}\n')
    runner = CliRunner()
    result = runner.invoke(cli, ["fix", str(ds), "--plan", str(top / "plan.json")])
    assert result.exit_code == 1, result.output
    applied = top / "applied"
    shutil.copytree(ds, applied)
    result = runner.invoke(cli, ["fix", str(applied), "--apply", "--backup-dir",
                                 str(top / "backups")])
    assert result.exit_code == 0, result.output
    return top


def fresh_case(base: Path, where: Path, *, applied: bool = False) -> Case:
    """A copy of the study (or of its applied state with the journal), every absolute
    path in the plan and the journal moved to the copy."""
    where.mkdir()
    shutil.copytree(base / ("applied" if applied else "ds"), where / "ds", symlinks=True)
    shutil.copytree(base / "victim", where / "victim")
    for name in ("plan.json",):
        text = (base / name).read_text()
        (where / name).write_text(text.replace(str(base / "ds"), str(where / "ds")))
    if applied:
        shutil.copytree(base / "backups", where / "backups")
        journal = where / "backups" / "journal.json"
        journal.write_text(journal.read_text().replace(str(base / "applied"), str(where / "ds")))
    return Case(where)


# ---------------------------------------------------------------------------- damage


def damaged_bytes(rng: random.Random, data: bytes) -> bytes:
    """``data`` with one random kind of damage."""
    kind = rng.randrange(6)
    if not data:
        return bytes(rng.randrange(256) for _ in range(rng.randrange(1, 64)))
    at = rng.randrange(len(data))
    if kind == 0:  # flip a few bytes
        out = bytearray(data)
        for _ in range(rng.randrange(1, 8)):
            out[rng.randrange(len(out))] = rng.randrange(256)
        return bytes(out)
    if kind == 1:  # truncate
        return data[:at]
    if kind == 2:  # insert garbage
        return data[:at] + bytes(rng.randrange(256) for _ in range(rng.randrange(1, 32))) + \
            data[at:]
    if kind == 3:  # duplicate a stretch
        return data[:at] + data[at: at + rng.randrange(1, 200)] + data[at:]
    if kind == 4:  # empty
        return b""
    return data + bytes(rng.randrange(256) for _ in range(rng.randrange(1, 512)))


ODD_VALUES: list[Any] = [
    None, True, 0, -1, 1e308, -1e-308, 10**400, "1.0", "", "ms", [], {}, [[0.1]], [None],
    [0.0, "0.5"], [0.0, 1e309], [float("nan")] * 3, list(range(400)), {"SliceTiming": [0]},
    [0.0] * 5000, "\u202e\x00\x1b[31m", [-5.0, 0.0, 5.0],
]
FIELDS = ["SliceTiming", "RepetitionTime", "SliceEncodingDirection", "DelayTime",
          "VolumeTiming", "MultibandAccelerationFactor", "AcquisitionDuration", "TaskName",
          "SeriesNumber", "PhaseEncodingDirection"]


def odd_json(rng: random.Random) -> bytes:
    """A sidecar: damaged JSON, odd values, deep nesting, other encodings."""
    kind = rng.randrange(5)
    if kind == 0:
        content: dict[str, Any] = {rng.choice(FIELDS): rng.choice(ODD_VALUES)
                                   for _ in range(rng.randrange(1, 5))}
        text = json.dumps(content, allow_nan=True)
        return text.encode()
    if kind == 1:
        depth = rng.choice([10, 200, 5000])
        return (b'{"SliceTiming": ' + b"[" * depth + b"0" + b"]" * depth + b"}")
    if kind == 2:
        text = json.dumps({"SliceTiming": [0.0, 0.5, 1.0], "RepetitionTime": 2.0})
        return text.encode(rng.choice(["utf-16", "utf-32", "utf-8-sig", "latin-1"]))
    if kind == 3:
        return b'{"SliceTiming": [0, 0.5, 1.0], "SliceTiming": "dup", "x": NaN, "y": -Infinity}'
    return damaged_bytes(rng, json.dumps({"SliceTiming": [0.0, 0.5, 1.0]}).encode())


def odd_name(rng: random.Random) -> str:
    """A file name with spaces, controls, escapes, non-UTF-8 bytes, odd dots; at most
    255 bytes (NAME_MAX on Linux, common practice, no source)."""
    alphabet = string.ascii_letters + string.digits + " -_.+=,;'\"\\$()[]{}~#%&!\t\u00e9\u202e"
    stem = "".join(rng.choice(alphabet) for _ in range(rng.randrange(1, 40)))
    if rng.random() < 0.3:
        stem += os.fsdecode(bytes([rng.randrange(0x80, 0x100)]))  # not UTF-8
    if rng.random() < 0.2:
        stem = "sub-01_task-" + "a" * rng.randrange(200, 236)
    name = rng.choice([f"sub-01_task-{stem}_bold.nii.gz", f"{stem}.nii.gz", f"{stem}_bold.nii",
                       f"sub-01_{stem}.nii.gz"])
    name = name.replace("/", "_")
    while len(os.fsencode(name)) > 255:
        name = name[1:]
    return name


POLICY_VALUES = ['2.0', '0', '-1', '1e400', '"x"', '[]', '{}', 'true', '20', '10', '1',
                 '"interleaved"', '"ascending"', '"no-such"', '"**"', '["*"]', '["timing/*"]']


def odd_policy(rng: random.Random) -> str:
    """A lab policy (the README's layout) with odd values, or loose TOML pieces."""
    if rng.random() < 0.6:
        values = {"version": "1", "task": '"hum"', "repetition_time": "2.0", "slices": "10",
                  "multiband_factor": "1", "scheme": '"interleaved"', "code": '"timing/units-ms"',
                  "severity": '"note"', "paths": '["sub-02/**"]', "codes": '["timing/*"]',
                  "reason": '"pilot"'}
        if rng.random() < 0.6:  # one odd value; else a valid policy
            values[rng.choice(sorted(values))] = rng.choice(POLICY_VALUES)
        v = values
        return (
            f"version = {v['version']}\n\n[[protocols]]\nmatch = {{ task = {v['task']} }}\n"
            f"repetition_time = {v['repetition_time']}\nslices = {v['slices']}\n"
            f"multiband_factor = {v['multiband_factor']}\nscheme = {v['scheme']}\n\n"
            f"[severity]\n{v['code']} = {v['severity']}\n\n[[ignore]]\n"
            f"paths = {v['paths']}\ncodes = {v['codes']}\nreason = {v['reason']}\n"
        )
    pieces = ["[[protocols]]\n", "version = 1\n", "slices = -4\n", "= = =\n",
              "a = [1, [2, [3]]]\n", 'unknown = "key"\n', "[severity]\n", "[[ignore]]\n"]
    return "".join(rng.choice(pieces) for _ in range(rng.randrange(0, 8)))


def odd_map(rng: random.Random, case: Case) -> str:
    rows = []
    for _ in range(rng.randrange(0, 5)):
        run = rng.choice([RUN, "../../victim/precious.json", "/etc/passwd", "", "run", RUN * 3])
        series = rng.choice(["sourcedata/sub-01/func", "/", "/proc", "/dev", "..", "",
                             str(case.root / "victim"), "sourcedata"])
        rows.append("\t".join(rng.sample([run, series, "extra"], rng.randrange(1, 4))))
    return "\n".join(rows)


def mutate_json_leaf(rng: random.Random, value: Any, victim: Path) -> Any:
    """``value`` with one leaf replaced by an odd value or an attacking path."""
    attacks: list[Any] = ["../../victim/precious.json", str(victim / "precious.json"), "/",
                          "..", "", None, -1, 2**70, [], {}, "a" * 300, "\x00"]
    if isinstance(value, dict) and value:
        key = rng.choice(sorted(value))
        if rng.random() < 0.1:
            return {k: v for k, v in value.items() if k != key}
        return {**value, key: mutate_json_leaf(rng, value[key], victim)}
    if isinstance(value, list) and value:
        i = rng.randrange(len(value))
        return [*value[:i], mutate_json_leaf(rng, value[i], victim), *value[i + 1:]]
    return rng.choice(attacks + ODD_VALUES[:8])


# ---------------------------------------------------------------------------- cases


def _sidecar_case(rng: random.Random, case: Case) -> None:
    target = rng.choice([case.ds / "sub-01/func/sub-01_task-hum_bold.json",
                         case.ds / "task-hum_bold.json", case.ds / "dataset_description.json"])
    target.write_bytes(odd_json(rng))
    case.args = [rng.choice(["audit", "fix"]), str(case.ds)]


def _image_bytes(case: Case) -> tuple[Path, bytes]:
    path = case.ds / RUN
    return path, gzip.decompress(path.read_bytes())


def _header_case(rng: random.Random, case: Case) -> None:
    path, raw = _image_bytes(case)
    header = bytearray(raw[:352])
    for _ in range(rng.randrange(1, 6)):
        at = rng.randrange(352)
        header[at] = rng.choice([0, 0xFF, 0x7F, 0x80, rng.randrange(256)])
    path.write_bytes(gzip.compress(bytes(header) + raw[352:]))
    case.args = [rng.choice(["audit", "show", "audit"]), str(path if rng.random() < .3
                                                             else case.ds)]


def _gzip_case(rng: random.Random, case: Case) -> None:
    path = case.ds / RUN
    path.write_bytes(damaged_bytes(rng, path.read_bytes()))
    case.args = ["audit", str(case.ds)]


def _name_case(rng: random.Random, case: Case) -> None:
    path = case.ds / RUN
    target = path.with_name(odd_name(rng))
    os.rename(path, target)
    case.args = [rng.choice(["audit", "fix"]), str(case.ds)]


def _dicom_case(rng: random.Random, case: Case) -> None:
    folder = case.ds / "sourcedata" / "sub-01" / "func"
    files = sorted(folder.iterdir())
    victim = rng.choice(files)
    victim.write_bytes(damaged_bytes(rng, victim.read_bytes()))
    if rng.random() < 0.3:
        (folder / "00-empty").write_bytes(b"")
    case.args = ["audit", str(case.ds), "--source"]


def _policy_case(rng: random.Random, case: Case) -> None:
    policy = case.root / "policy.toml"
    policy.write_text(odd_policy(rng))
    case.args = ["audit", str(case.ds), "--policy", str(policy)]


def _map_case(rng: random.Random, case: Case) -> None:
    source_map = case.root / "map.tsv"
    source_map.write_text(odd_map(rng, case))
    case.args = ["audit", str(case.ds), "--source-map", str(source_map)]


def _plan_case(rng: random.Random, case: Case) -> None:
    plan = case.root / "plan.json"
    content = json.loads(plan.read_text())
    write_json(plan, mutate_json_leaf(rng, content, case.root / "victim"))
    case.args = ["fix", "--apply", "--plan", str(plan), "--backup-dir",
                 str(case.root / "backups")]
    case.allowed = ["ds", "backups"]


def _journal_case(rng: random.Random, case: Case) -> None:
    journal = case.root / "backups" / "journal.json"
    content = json.loads(journal.read_text())
    write_json(journal, mutate_json_leaf(rng, content, case.root / "victim"))
    case.args = ["fix", "--undo", str(journal)]
    case.allowed = ["ds", "backups"]


def _timing_case(rng: random.Random, case: Case) -> None:
    case.args = ["timing", "--slices", str(rng.choice([1, 2, 7, 64, 0, -3, 40000, 10**12])),
                 "--tr", str(rng.choice([2, 0.001, 0, -1, 1e9, "nan", "inf"]))]
    for option, values in (("--multiband", [1, 2, 3, 0, 10**9]), ("--step", [1, 2, 0, 99]),
                           ("--first", ["auto", "0", "1", "-1", "x"]),
                           ("--delay-time", [0.5, 0, 5, "nan"]),
                           ("--order", ["interleaved", "sequential"])):
        if rng.random() < 0.4:
            case.args += [option, str(rng.choice(values))]


KINDS: dict[str, tuple[Callable[[random.Random, Case], None], int, bool]] = {
    # kind: (builder, cases per run, built on the applied copy)
    "sidecar": (_sidecar_case, 50, False),
    "header": (_header_case, 40, False),
    "gzip": (_gzip_case, 25, False),
    "name": (_name_case, 25, False),
    "dicom": (_dicom_case, 20, False),
    "policy": (_policy_case, 30, False),
    "source-map": (_map_case, 20, False),
    "plan": (_plan_case, 25, False),
    "journal": (_journal_case, 25, True),
    "timing": (_timing_case, 30, False),
}


# ---------------------------------------------------------------------------- running


def _on_timer(signum: int, frame: Any) -> None:
    raise Hang


def run_within_deadline(args: list[str]) -> Any:
    previous = signal.signal(signal.SIGALRM, _on_timer)
    signal.setitimer(signal.ITIMER_REAL, DEADLINE)
    try:
        return CliRunner().invoke(cli, args)
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)


def protected(case: Case) -> dict[str, str]:
    """The bytes of every file the command may not touch."""
    allowed = {case.root / name for name in case.allowed}
    out: dict[str, str] = {}
    for name, digest in tree_hashes(case.root).items():
        if not any(Path(case.root / name).is_relative_to(a) for a in allowed):
            out[name] = digest
    return out


def cases(kind: str, base: Path, tmp: Path) -> Iterator[tuple[int, Case]]:
    builder, count, applied = KINDS[kind]
    rng = random.Random(f"{SEED}-{kind}")
    for number in range(count):
        case = fresh_case(base, tmp / f"{kind}-{number}", applied=applied)
        builder(rng, case)
        yield number, case


@pytest.mark.parametrize("kind", sorted(KINDS))
def test_fuzzed_inputs_give_a_clean_outcome(kind: str, base: Path, tmp_path: Path) -> None:
    for number, case in cases(kind, base, tmp_path):
        where = f"seed {SEED}, {kind} case {number}: slicetime {' '.join(case.args)}"
        before = protected(case)
        try:
            result = run_within_deadline(case.args)
        except Hang:
            pytest.fail(f"{where}: no answer within {DEADLINE} s")
        exc = result.exception
        assert exc is None or isinstance(exc, SystemExit), f"{where}: {exc!r}"
        assert result.exit_code != EXIT_INTERNAL, f"{where}: {result.output}"
        assert "Traceback" not in result.output, f"{where}: {result.output}"
        assert protected(case) == before, f"{where}: wrote outside the allowed places"
        shutil.rmtree(case.root)
