"""The JSON Schemas shipped in ``slicetime/data``: loading them, a validator that
resolves references between them, and a document's first problem in one line.

Every JSON file or output slicetime writes has one; the files it reads back (a saved
fix plan, a fix journal) are validated by theirs (:mod:`slicetime.pipelines.transaction`).
"""

from __future__ import annotations

import json
from functools import cache
from typing import Any

from slicetime.codes import package_data

from .schema_text import describe_schema

#: the JSON Schema of every JSON file or output the tool writes (slicetime/data)
SCHEMAS = {
    "report": "report.schema.json",          # audit --format json
    "report-lines": "report-lines.schema.json",  # audit --format jsonl, each line
    "show": "show.schema.json",              # show --format json (a run, or a DICOM series)
    "correct": "correct.schema.json",        # correct --format json
    "verify": "verify.schema.json",          # verify --format json
    "fix-plan": "fix-plan.schema.json",      # fix --plan FILE
    "fix-journal": "fix-journal.schema.json",  # fix --apply journal.json
    "provenance": "provenance.schema.json",  # slicetime-provenance.json (and the sidecar
                                             # SliceTimeAlignment: #/$defs/alignment_strict)
}


@cache
def load_schema(name: str) -> dict[str, Any]:
    """A shipped schema by its name in :data:`SCHEMAS` (or its file name)."""
    file = SCHEMAS.get(name, name)
    return json.loads(package_data(file).decode("utf-8"))


def schema_validator(name: str, pointer: str = "") -> Any:
    """A jsonschema validator for a shipped schema (``pointer``: a part of it, such as
    ``#/$defs/alignment_strict``), resolving references between the shipped schemas."""
    import jsonschema
    from referencing import Registry, Resource

    registry = Registry().with_resources([
        (f"slicetime/{file}", Resource.from_contents(load_schema(file)))
        for file in SCHEMAS.values()])
    schema = load_schema(name)
    if pointer:
        schema = {"$ref": f"slicetime/{SCHEMAS.get(name, name)}{pointer}"}
    return jsonschema.Draft202012Validator(schema, registry=registry)


def document_problem(name: str, document: Any) -> str | None:
    """The first way ``document`` breaks the shipped schema ``name``, in one line that
    names the place (``entries[2].sha256_after``); None when it is valid."""
    import jsonschema

    error = jsonschema.exceptions.best_match(schema_validator(name).iter_errors(document))
    if error is None:
        return None
    place = "".join(f"[{p}]" if isinstance(p, int) else f".{p}" for p in error.absolute_path)
    place = place.lstrip(".") or "the top level"
    if error.validator == "required" and isinstance(error.instance, dict):
        missing = [k for k in error.validator_value if k not in error.instance]
        return f"{place} lacks {missing[0]!r}" if missing else f"{place}: {error.message}"
    if error.validator == "additionalProperties" and isinstance(error.instance, dict):
        known = error.schema.get("properties", {})
        extra = [k for k in error.instance if k not in known]
        return f"{place} has an unknown key {extra[0]!r}" if extra else f"{place}: {error.message}"
    shown = json.dumps(error.instance)
    shown = shown if len(shown) <= 40 else shown[:37] + "..."
    if error.validator == "pattern":
        return f"{place} is {shown}, not a string matching {error.validator_value}"
    return f"{place} is {shown}, not {describe_schema(error.schema)}"


__all__ = ["SCHEMAS", "document_problem", "load_schema", "schema_validator"]
