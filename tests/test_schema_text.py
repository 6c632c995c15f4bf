"""One wording of "what a value must be" for sidecar and policy messages."""

from __future__ import annotations

import json
from importlib import resources

import jsonschema

from slicetime.policy.loading import _describe as policy_words
from slicetime.readers.schema_text import describe_schema
from slicetime.readers.sidecar import _describe as sidecar_words


def test_both_validators_word_the_same_schema_the_same_way() -> None:
    schema = {"type": "number", "exclusiveMinimum": 0}
    assert sidecar_words(schema) == policy_words(schema) == "a number greater than 0"
    assert describe_schema({"type": "array", "items": {"type": "number", "minimum": 0}}) == \
        "an array of numbers of at least 0"


def test_every_sidecar_field_is_worded_and_the_words_fit_what_the_schema_accepts() -> None:
    # jsonschema (the reference validator) accepts a value the words describe: for each
    # field, the described kind of value validates and the described bound is the schema's
    schema = json.loads(resources.files("slicetime.data").joinpath(
        "sidecar.schema.json").read_text(encoding="utf-8"))
    for name, field in schema["properties"].items():
        words = describe_schema(field)
        assert words and "valid value" not in words, name
        if words == "a number greater than 0":
            jsonschema.validate(1.5, field)
            assert not jsonschema.Draft202012Validator(field).is_valid(0)
