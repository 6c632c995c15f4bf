"""JSON Schema fragments in words: the one wording of "what a value must be".

The sidecar field checks (``sidecar/wrong-type``) and the lab policy's
validation messages both say what a value should have been by describing the
schema that rejected it; this module is the only place that wording lives.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping
from typing import Any

_NOUNS = {
    "number": ("a number", "numbers"),
    "integer": ("a whole number", "whole numbers"),
    "string": ("a string", "strings"),
    "boolean": ("true or false", "true or false values"),
    "null": ("null", "nulls"),
}


def describe_schema(
    schema: Mapping[str, Any],
    *,
    plural: bool = False,
    resolve: Callable[[str], Mapping[str, Any]] | None = None,
    object_word: tuple[str, str] = ("an object", "objects"),
    pattern_words: Mapping[str, str] | None = None,
) -> str:
    """What a value matching ``schema`` is, in words ("a number greater than 0").

    ``resolve`` turns a ``$ref`` into its schema; ``object_word`` names an
    object (a TOML file says "a table"); ``pattern_words`` names string patterns.
    """

    def words(part: Mapping[str, Any], many: bool) -> str:
        if "$ref" in part and resolve is not None:
            return words(resolve(str(part["$ref"])), many)
        if "anyOf" in part or "oneOf" in part:
            return " or ".join(words(p, many) for p in part.get("anyOf", part.get("oneOf")))
        if "const" in part:
            return json.dumps(part["const"])
        if "enum" in part:
            return "one of " + ", ".join(str(v) for v in part["enum"])
        kind = part.get("type")
        if isinstance(kind, list):
            return " or ".join(words({**part, "type": k}, many) for k in kind)
        if kind == "array":
            base = ("non-empty arrays" if many else "a non-empty array") if part.get(
                "minItems") else ("arrays" if many else "an array")
            items = part.get("items")
            return f"{base} of {words(items, True)}" if items else base
        if kind == "object":
            return object_word[1] if many else object_word[0]
        if kind in ("number", "integer"):
            text = _NOUNS[kind][1 if many else 0]
            if "exclusiveMinimum" in part:
                return f"{text} greater than {part['exclusiveMinimum']}"
            if "minimum" in part:
                return f"{text} of at least {part['minimum']}"
            return text
        if kind == "string":
            if "pattern" in part and pattern_words and part["pattern"] in pattern_words:
                return pattern_words[part["pattern"]]
            if part.get("minLength"):
                return "non-empty strings" if many else "a non-empty string"
            return _NOUNS["string"][1 if many else 0]
        if kind in _NOUNS:
            return _NOUNS[kind][1 if many else 0]
        return "valid values" if many else "a valid value"

    return words(schema, plural)


__all__ = ["describe_schema"]
