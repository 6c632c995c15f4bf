"""The import rule of DESIGN.md, checked on the source: a module imports only from its
own layer or the layers below it.

Layers, bottom up (DEVELOPERS.md, Architecture map):

1. model: ``slicetime.model``, ``slicetime.model_source``, ``slicetime.codes`` (the
   catalogue of finding codes, whole on import), ``slicetime.numbers``, ``slicetime.words``,
   ``slicetime.escapes``;
2. schemes: ``slicetime.schemes``;
3. readers: ``slicetime.readers``, and the lab policy, the whole package
   ``slicetime.policy`` (reading it, its value types and its checks);
4. rules: ``slicetime.rules``;
5. engines: ``slicetime.engines``;
6. pipelines: ``slicetime.pipelines``, and the public API (``slicetime.api``: it
   composes schemes and engines for Python callers, as a pipeline does for files);
7. interfaces: ``slicetime.interfaces`` and ``slicetime.__main__``.

The package root ``slicetime`` (``__init__.py``) holds the version, which every layer
may import, and re-exports the API lazily; it counts as the top layer for what it
imports itself. Every import is checked, at module level and inside functions
(a lazy import is still a dependency); the few that go upwards are listed in
:data:`ALLOWED` with the reason, so a new one fails until someone decides on it.
"""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "slicetime"

LAYERS: list[tuple[str, int]] = [
    # most specific prefix first
    ("slicetime.policy", 3),  # the whole package: one layer (DEVELOPERS.md, Decisions)
    ("slicetime.model_source", 1),
    ("slicetime.codes", 1),  # the catalogue of finding codes and make_finding: pure
    ("slicetime.model", 1),
    ("slicetime.numbers", 1),  # how numbers are rounded and written: pure
    ("slicetime.words", 1),  # plurals and agreement: pure
    ("slicetime.escapes", 1),  # how a file name's non-UTF-8 bytes are written: pure
    ("slicetime.schemes", 2),
    ("slicetime.readers", 3),
    ("slicetime.rules", 4),
    ("slicetime.engines", 5),
    ("slicetime.pipelines", 6),
    ("slicetime.api", 6),
    ("slicetime.interfaces", 7),
    ("slicetime.__main__", 7),
]
NAMES = {1: "model", 2: "schemes", 3: "readers", 4: "rules", 5: "engines", 6: "pipelines",
         7: "interfaces", 8: "package root"}

#: (importing module, imported module): why this upward import is accepted
#: (none today: the demo's tour, which printed through the interfaces from the
#: pipelines layer, moved to slicetime.interfaces.demo_tour)
ALLOWED: dict[tuple[str, str], str] = {}


def layer_of(module: str) -> int | None:
    if module == "slicetime":
        return 8
    for prefix, layer in LAYERS:
        if module == prefix or module.startswith(prefix + "."):
            return layer
    return None


def module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def imports_of(path: Path, module: str) -> list[tuple[str, int, list[str]]]:
    """(imported module, line, names) of every import statement in the file."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    found: list[tuple[str, int, list[str]]] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [(alias.name, node.lineno, []) for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                target = ".".join([*base, node.module] if node.module else base)
            else:
                target = node.module or ""
            names = [alias.name for alias in node.names]
            # "from slicetime.rules import timing" imports the module slicetime.rules.timing
            for name in names:
                sub = f"{target}.{name}"
                if layer_of(sub) is not None and (PACKAGE.parent / (sub.replace(".", "/") + ".py")
                                                  ).exists():
                    found.append((sub, node.lineno, []))
                    break
            else:
                found.append((target, node.lineno, names))
    return [f for f in found if f[0] == "slicetime" or f[0].startswith("slicetime.")]


def violations() -> list[str]:
    out = []
    for path in sorted(PACKAGE.rglob("*.py")):
        module = module_name(path)
        own = layer_of(module)
        assert own is not None, f"{module} has no layer: add it to LAYERS (and DEVELOPERS.md)"
        for target, line, names in imports_of(path, module):
            if target == "slicetime" and set(names) <= {"__version__"}:
                continue  # the version, from the package root, is for everyone
            theirs = layer_of(target)
            assert theirs is not None, f"{module}:{line} imports {target}, which has no layer"
            if theirs <= own:
                continue
            key = next((k for k in ALLOWED if module.startswith(k[0]) and target == k[1]),
                       None)
            if key is not None:
                continue
            out.append(f"{path.relative_to(PACKAGE.parent)}:{line}: {module} "
                       f"({NAMES[own]}) imports {target} ({NAMES[theirs]})")
    return out


def test_no_module_imports_from_a_higher_layer() -> None:
    found = violations()
    # the walk saw the package: some imports cross layers downwards
    assert len(list(PACKAGE.rglob("*.py"))) > 60
    assert not found, "imports against the layer order:\n" + "\n".join(found)


def test_every_allowed_exception_is_still_needed() -> None:
    """An entry of ALLOWED whose import is gone must be removed (the list stays true)."""
    for (module, target), _why in ALLOWED.items():
        used = False
        for path in PACKAGE.rglob("*.py"):
            name = module_name(path)
            if name == module or name.startswith(module + "."):
                used |= any(t == target for t, _, _ in imports_of(path, name))
        assert used, f"ALLOWED lists {module} -> {target}, which no longer exists"


def test_the_checker_sees_an_upward_import(tmp_path: Path) -> None:
    """The check is not vacuous: a rules module importing a pipeline is caught."""
    fake = tmp_path / "slicetime" / "rules" / "bad.py"
    fake.parent.mkdir(parents=True)
    fake.write_text("def f():\n    from slicetime.pipelines.audit import audit_paths\n")
    found = imports_of(fake, "slicetime.rules.bad")
    assert found == [("slicetime.pipelines.audit", 2, ["audit_paths"])]
    assert layer_of(found[0][0]) == 6 and layer_of("slicetime.rules.bad") == 4


def private_imports(path: Path, module: str) -> list[str]:
    """Names with a leading underscore that the file takes from another slicetime module:
    by import, or as an attribute of an imported slicetime module (``junit._folder``)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    found = [f"{path.name}:{line}: {name} from {target}"
             for target, line, names in imports_of(path, module) if target != module
             for name in names if name.startswith("_") and not name.startswith("__")]
    modules = {alias.asname or alias.name.rpartition(".")[2]
               for node in ast.walk(tree) if isinstance(node, ast.ImportFrom)
               and (node.module or "").startswith("slicetime") for alias in node.names
               if (PACKAGE.parent / f"{node.module}.{alias.name}".replace(".", "/")
                   ).with_suffix(".py").exists()}
    found += [f"{path.name}:{node.lineno}: {node.value.id}.{node.attr}"
              for node in ast.walk(tree) if isinstance(node, ast.Attribute)
              and isinstance(node.value, ast.Name) and node.value.id in modules
              and node.attr.startswith("_") and not node.attr.startswith("__")]
    return found


def test_no_module_imports_another_modules_private_name() -> None:
    """A leading underscore marks a name internal to its module (PEP 8, "Descriptive:
    Naming Styles": "weak internal use indicator"); a name another module needs is
    public in its owner."""
    found = [hit for path in sorted(PACKAGE.rglob("*.py"))
             for hit in private_imports(path, module_name(path))]
    assert not found, "private names used across modules:\n" + "\n".join(found)


def test_the_checker_sees_a_private_import(tmp_path: Path) -> None:
    """Not vacuous: an imported private function and a private attribute of an
    imported module are both caught."""
    fake = tmp_path / "slicetime" / "interfaces" / "bad.py"
    fake.parent.mkdir(parents=True)
    fake.write_text("from slicetime.pipelines.journal import _hidden\n"
                    "from slicetime.interfaces import report_junit as junit\n"
                    "junit._inner('x')\n")
    found = private_imports(fake, "slicetime.interfaces.bad")
    assert found == ["bad.py:1: _hidden from slicetime.pipelines.journal",
                     "bad.py:3: junit._inner"]
