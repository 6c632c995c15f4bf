"""The code catalogue (slicetime.codes) is the only way to make a finding.

Checked on the source (an ast walk, as tests/test_layers.py does for imports) and at
run time: make_finding refuses unregistered codes and unstated-or-unallowed severities,
every construction site names a registered code, readers find their codes registered
without the rules layer, and fixability is declared on the rule.
"""

from __future__ import annotations

import ast
import importlib
import subprocess
import sys
from pathlib import Path

import pytest

from slicetime.codes import CHECKED, RULES, UnknownCode, make_finding
from slicetime.model import Severity
from slicetime.rules import explain
from slicetime.rules.repairs import FIXABLE

PACKAGE = Path(__file__).resolve().parents[1] / "slicetime"

#: modules that may still call Finding(...) directly, and why
ALLOWED_FINDING_CALLS = {
    "slicetime.model": "the type's own helpers (with_severity)",
    "slicetime.codes": "make_finding itself",
}
#: calls whose first argument is a finding code
CODE_TAKERS = {"make_finding", "ReadError", "run_rule", "dataset_rule", "reader_code",
               "declare", "failed_run", "_problem_rule"}


def _modules() -> list[tuple[str, ast.Module]]:
    found = []
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts.pop()
        found.append((".".join(parts), ast.parse(path.read_text("utf-8"))))
    return found


def _callee(call: ast.Call) -> str | None:
    func = call.func
    if isinstance(func, ast.Name):
        return func.id
    if isinstance(func, ast.Attribute):
        return func.attr
    return None


def test_no_finding_is_constructed_outside_the_catalogue() -> None:
    offenders = [
        f"{module}:{node.lineno}"
        for module, tree in _modules() if module not in ALLOWED_FINDING_CALLS
        for node in ast.walk(tree)
        if isinstance(node, ast.Call) and _callee(node) == "Finding"
    ]
    assert not offenders, offenders


def test_every_construction_site_names_a_registered_code() -> None:
    # a literal code, or a module constant (CLASH_CODE, CODE), must be registered;
    # codes computed at run time are checked by make_finding itself (test below)
    checked = 0
    unregistered = []
    for module, tree in _modules():
        for node in ast.walk(tree):
            if not (isinstance(node, ast.Call) and _callee(node) in CODE_TAKERS and node.args):
                continue
            # failed_run(root, path, code, why); the others take the code first
            position = 2 if _callee(node) == "failed_run" else 0
            if len(node.args) <= position:
                continue
            first = node.args[position]
            code: object = None
            if isinstance(first, ast.Constant):
                code = first.value
            elif isinstance(first, ast.Name) and first.id.isupper():
                code = getattr(importlib.import_module(module), first.id, None)
            if isinstance(code, str) and "/" in code:
                checked += 1
                if code not in RULES:
                    unregistered.append(f"{module}:{node.lineno}: {code}")
    assert checked > 60  # the walk really sees the call sites
    assert not unregistered, unregistered


def test_the_catalogue_is_whole_after_importing_slicetime_codes_alone() -> None:
    # a fresh interpreter that imports only slicetime.codes knows every code, in the
    # same order, as this one after importing the rules, the pipelines and the commands
    import slicetime.interfaces.commands.audit
    import slicetime.pipelines.correct
    import slicetime.pipelines.verify  # noqa: F401
    from slicetime.codes import RENAMED

    script = ("import sys, slicetime.codes as c; print(' '.join(c.RULES)); "
              "print(' '.join(f'{k}={v}' for k, v in c.RENAMED.items())); "
              "print(' '.join(sorted(m for m in sys.modules if m.startswith('slicetime'))))")
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                         check=True).stdout.split("\n")
    assert out[0].split() == list(RULES) and len(RULES) > 80
    assert out[1].split() == [f"{k}={v}" for k, v in RENAMED.items()]
    # nothing but the model is loaded with it (no module imported for its registrations)
    assert set(out[2].split()) <= {"slicetime", "slicetime.codes", "slicetime.model",
                                   "slicetime.numbers"}


def test_every_run_and_dataset_code_has_exactly_one_check() -> None:
    from slicetime.rules.bindings import DATASET_CHECKS, RUN_CHECKS

    run_codes = [code for code, _ in RUN_CHECKS]
    dataset_codes = [code for code, _ in DATASET_CHECKS]
    assert len(set(run_codes)) == len(run_codes)
    assert len(set(dataset_codes)) == len(dataset_codes)
    assert set(run_codes) == {c for c, r in RULES.items() if r.scope == "run"}
    assert set(dataset_codes) == {c for c, r in RULES.items() if r.scope == "dataset"}
    assert all(callable(check) for _, check in (*RUN_CHECKS, *DATASET_CHECKS))


def test_no_module_of_the_package_is_imported_for_its_side_effect() -> None:
    # an import kept only for what it registers shows as an unused import the linter
    # is told to accept (F401); none may name a slicetime module
    offenders = []
    for path in sorted(PACKAGE.rglob("*.py")):
        for number, line in enumerate(path.read_text("utf-8").splitlines(), 1):
            if "noqa: F401" in line and line.lstrip().startswith("import slicetime"):
                offenders.append(f"{path.relative_to(PACKAGE.parent)}:{number}")
    assert not offenders, offenders


def test_make_finding_uses_the_registered_severity_and_refuses_unknown_codes() -> None:
    finding = make_finding("sidecar/bad-json", "x.json: invalid JSON", file="x.json")
    assert finding.severity is RULES["sidecar/bad-json"].severity is Severity.ERROR
    assert (finding.file, finding.field, dict(finding.evidence), finding.hint) == (
        "x.json", None, {}, None)
    with pytest.raises(UnknownCode, match="sidecar/no-such-code"):
        make_finding("sidecar/no-such-code", "message")
    # an override is allowed only when the registration lists it
    assert make_finding("inherit/timing-override", "m", severity=Severity.ERROR).severity \
        is Severity.ERROR
    with pytest.raises(ValueError, match="not among its allowed overrides"):
        make_finding("inherit/timing-override", "m", severity=Severity.WARNING)
    with pytest.raises(ValueError):
        make_finding("file/missing", "m", severity=Severity.NOTE)


def test_a_rule_hit_cannot_state_a_severity_its_rule_does_not_allow() -> None:
    from slicetime.rules.registry import Hit, to_finding

    rule = RULES["timing/missing"]
    assert to_finding(rule, None, Hit("m")).severity is rule.severity
    with pytest.raises(ValueError):
        to_finding(rule, None, Hit("m", severity=Severity.NOTE))


def test_the_readers_find_their_codes_registered_without_the_rules_layer() -> None:
    # a fresh interpreter that imports only the readers: every code literal a reader
    # module passes to make_finding or ReadError is in the catalogue
    readers = [m for m, _ in _modules() if m.startswith("slicetime.readers")
               or m == "slicetime.policy.loading"]
    script = (
        "import importlib, sys\n"
        f"for m in {readers!r}: importlib.import_module(m)\n"
        "assert 'slicetime.rules' not in sys.modules, 'the readers imported the rules'\n"
        "from slicetime.codes import RULES\n"
        "print(' '.join(sorted(RULES)))\n"
    )
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                          check=True)
    registered = set(done.stdout.split())
    used = set()
    for module, tree in _modules():
        if module not in readers:
            continue
        for node in ast.walk(tree):
            if (isinstance(node, ast.Call) and _callee(node) in {"make_finding", "ReadError"}
                    and node.args and isinstance(node.args[0], ast.Constant)):
                used.add(node.args[0].value)
    used.add(importlib.import_module("slicetime.readers.dicom_files").CODE)
    assert len(used) > 10
    assert used <= registered, sorted(used - registered)


def test_every_registered_code_is_documented() -> None:
    # walks the registry: title, rationale, where it is checked, allowed overrides
    for code, rule in RULES.items():
        assert rule.code == code
        assert rule.title and rule.rationale.strip(), code
        assert rule.checked in CHECKED, code
        assert rule.severity not in rule.also_severities, code
        text = explain(code)
        assert f"default severity: {rule.severity.value}" in text
        assert ("slicetime fix repairs this." in text) is rule.fixable


def test_fixable_is_declared_on_the_rules_that_fix_repairs() -> None:
    # FIXABLE is derived from the registry; every code a repair is made for is fixable,
    # and every fixable code has a repair in slicetime/rules/repairs.py
    assert FIXABLE == {c for c, r in RULES.items() if r.fixable}
    source = (PACKAGE / "rules" / "repairs.py").read_text("utf-8")
    tree = ast.parse(source)
    repaired = {
        node.args[1].value for node in ast.walk(tree)
        if isinstance(node, ast.Call) and _callee(node) == "_repair" and len(node.args) > 1
        and isinstance(node.args[1], ast.Constant)
    }
    assert repaired and repaired <= FIXABLE
    for code in FIXABLE:
        assert f'"{code}"' in source, code


def test_every_module_that_makes_findings_has_their_codes_registered_when_imported_alone(
) -> None:
    # a module imported on its own (a worker process, the public API, a script) must
    # not meet an unregistered code: importing it registers every code it passes
    import subprocess
    import sys

    script = r'''
import ast, importlib, pathlib, sys
name = sys.argv[1]
module = importlib.import_module(name)
from slicetime.codes import RULES
codes = set()
for node in ast.walk(ast.parse(pathlib.Path(module.__file__).read_text("utf-8"))):
    func = node.func if isinstance(node, ast.Call) else None
    called = getattr(func, "id", getattr(func, "attr", None))
    if called == "make_finding":
        first = node.args[0] if node.args else None
        if isinstance(first, ast.Constant) and isinstance(first.value, str):
            codes.add(first.value)
missing = sorted(c for c in codes if c not in RULES)
print(",".join(missing))
'''
    makers = sorted(
        ".".join(path.relative_to(PACKAGE.parent).with_suffix("").parts)
        for path in PACKAGE.rglob("*.py")
        if "make_finding(" in path.read_text("utf-8") and path.name != "codes.py")
    assert makers
    for name in makers:
        out = subprocess.run([sys.executable, "-c", script, name], capture_output=True,
                             text=True, check=True, cwd=PACKAGE.parent).stdout.strip()
        assert out == "", f"{name} emits unregistered codes when imported alone: {out}"


def test_the_catalogue_cache_gives_the_table_the_toml_parser_gives(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The parsed catalogue kept in the user's cache folder is used only when it was made
    from the same bytes; a stale or corrupt cache costs a parse, never another table."""
    import tomllib

    from slicetime import codes

    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path))
    source = codes.package_data("codes.toml")
    # reference: the standard library's TOML parser (PEP 680) on the shipped file
    expected = tomllib.loads(source.decode("utf-8"))
    assert codes._parsed_table(source) == expected  # parsed, then written
    cache = Path(codes._cache_path(source))
    assert cache.is_file() and cache.is_relative_to(tmp_path)
    assert codes._parsed_table(source) == expected  # read back from the cache

    # a cache whose recorded source differs (a stale file under this name) is not used
    import marshal
    cache.write_bytes(marshal.dumps((b"other", {"area/stale": {}})))
    assert codes._parsed_table(source) == expected
    assert marshal.loads(cache.read_bytes())[0] == source  # and was rewritten
    cache.write_bytes(b"\x00 not marshal data")
    assert codes._parsed_table(source) == expected

    # an edited catalogue is parsed anew (a file of its own, the old one left alone)
    edited = source + b'\n["area/extra"]\ntitle = "x"\n'
    assert codes._parsed_table(edited) == tomllib.loads(edited.decode("utf-8"))
    assert codes._cache_path(edited) != str(cache)


def test_the_catalogue_loads_where_no_cache_can_be_written(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import tomllib

    from slicetime import codes

    blocker = tmp_path / "file"
    blocker.write_text("a file where the cache folder would be")
    monkeypatch.setenv("XDG_CACHE_HOME", str(blocker))
    source = codes.package_data("codes.toml")
    # reference: the standard library's TOML parser (PEP 680)
    assert codes._parsed_table(source) == tomllib.loads(source.decode("utf-8"))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["file"]
