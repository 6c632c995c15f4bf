"""The hook definition for the pre-commit framework (.pre-commit-hooks.yaml).

What the framework expects of the file comes from its documentation on creating
hooks (from memory): a YAML list of mappings with ``id``, ``name``, ``entry`` and
``language``; ``entry`` is split like a shell command, ``args`` are appended,
and with ``pass_filenames: false`` no file names follow; hooks run from the
repository root. PyYAML is not a dependency, so the file is read with a small
strict parser for its flat form and, when PyYAML is installed, cross-checked.
"""

from __future__ import annotations

import importlib.util
import json
import re
import shlex
import shutil
import subprocess
import sys
from importlib import metadata
from pathlib import Path
from typing import Any

import pytest

from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import write_description, write_run, write_sidecar

REPO = Path(__file__).resolve().parents[1]
HOOKS = REPO / ".pre-commit-hooks.yaml"
RUN = "sub-01/func/sub-01_task-tap_bold.nii.gz"

_KEY_VALUE = re.compile(r"(?P<key>[a-z_]+): (?P<value>.+)\Z")
_PLAIN = re.compile(r"[A-Za-z0-9(][^#]*\Z")


def _scalar(text: str) -> Any:
    """One value of the flat form: true/false, a double-quoted string, a flow list of them,
    or a plain one-line string (YAML 1.2 core schema, from memory)."""
    text = text.strip()
    if text in ("true", "false"):
        return text == "true"
    if text.startswith('"'):
        return json.loads(text)  # a double-quoted YAML scalar without escapes is JSON
    if text.startswith("["):
        items = json.loads(text)  # a flow list of double-quoted strings is JSON too
        assert isinstance(items, list) and all(isinstance(i, str) for i in items), text
        return items
    assert _PLAIN.match(text) and ": " not in text, f"not a plain scalar: {text!r}"
    return text


def parse_flat_hooks(source: str) -> list[dict[str, Any]]:
    """Strictly parse a YAML list of flat mappings ("- key: value" then "  key: value")."""
    hooks: list[dict[str, Any]] = []
    for number, line in enumerate(source.splitlines(), 1):
        if not line.strip() or line.lstrip().startswith("#"):
            continue
        assert "\t" not in line, f"line {number}: tab"
        if line.startswith("- "):
            hooks.append({})
            body = line[2:]
        elif line.startswith("  ") and not line.startswith("   ") and hooks:
            body = line[2:]
        else:
            raise AssertionError(f"line {number}: not part of the flat form: {line!r}")
        match = _KEY_VALUE.match(body)
        assert match, f"line {number}: expected 'key: value': {line!r}"
        key = match["key"]
        assert key not in hooks[-1], f"line {number}: duplicate key {key}"
        hooks[-1][key] = _scalar(match["value"])
    return hooks


def load_hooks() -> list[dict[str, Any]]:
    source = HOOKS.read_text("utf-8")
    hooks = parse_flat_hooks(source)
    if importlib.util.find_spec("yaml") is not None:  # PyYAML as an independent parser
        import yaml

        assert yaml.safe_load(source) == hooks
    return hooks


def test_parser_is_strict() -> None:
    # common practice (no source): the small parser rejects what it does not understand
    assert parse_flat_hooks('- id: x\n  args: ["."]\n  always_run: true\n') == [
        {"id": "x", "args": ["."], "always_run": True}
    ]
    for bad in (
        "- id: x\n    entry: y\n",
        "id: x\n",
        "- id: x\n  id: y\n",
        "- id: {a: 1}\n",
        "- id: x # note\n",
        "-\tid: x\n",
    ):
        with pytest.raises(AssertionError):
            parse_flat_hooks(bad)


def test_hook_definition() -> None:
    hooks = load_hooks()
    assert len(hooks) == 1
    hook = hooks[0]
    # the framework's documentation (from memory): id, name, entry and language are required
    assert {"id", "name", "entry", "language"} <= set(hook)
    assert hook["id"] == "slicetime-audit"
    assert hook["language"] == "python"  # installs this repository with pip, then runs entry
    assert hook["entry"] == "slicetime audit"
    assert hook["pass_filenames"] is False and hook["always_run"] is True
    assert hook["args"] == ["."]


def _console_script() -> Path:
    try:
        dist = metadata.distribution("slicetime-bids")
    except metadata.PackageNotFoundError:  # pragma: no cover - running from a bare checkout
        pytest.skip("slicetime is not installed; the console script cannot be checked")
    scripts = {ep.name: ep.value for ep in dist.entry_points if ep.group == "console_scripts"}
    # Python packaging entry points specification: console_scripts name = module:function
    assert scripts.get("slicetime") == "slicetime.interfaces.entry:main"
    beside = Path(sys.executable).parent / "slicetime"
    found = beside if beside.exists() else shutil.which("slicetime")
    assert found is not None, "the slicetime console script is not on PATH"
    return Path(found)


@pytest.fixture()
def datasets(tmp_path: Path) -> tuple[Path, Path]:
    st = slice_timing(Protocol(n_slices=10, order="interleaved", repetition_time=2.0))
    clean, bad = tmp_path / "clean", tmp_path / "bad"
    for root, times in ((clean, st), (bad, [t * 1000 for t in st])):
        write_description(root)
        write_sidecar(root, "task-tap_bold.json", {"RepetitionTime": 2.0, "SliceTiming": times})
        write_run(root, RUN, shape=(4, 4, 10, 5), tr=2.0)
    return clean, bad


def test_entry_runs_the_installed_console_script(datasets: tuple[Path, Path]) -> None:
    hook = load_hooks()[0]
    words = shlex.split(hook["entry"])  # the framework splits entry like a shell command
    assert words[0] == "slicetime"
    script = _console_script()
    command = [str(script), *words[1:], *hook["args"]]  # pass_filenames: false: nothing more
    clean, bad = datasets
    for root, expected in ((clean, 0), (bad, 1)):
        # the framework runs hooks from the repository root (from memory)
        proc = subprocess.run(
            command, cwd=root, capture_output=True, text=True, timeout=60, check=False
        )
        assert proc.returncode == expected, proc.stdout + proc.stderr
        assert "Traceback" not in proc.stderr
    assert "timing/units-ms" in proc.stdout  # the bad run is named in the text report
