"""A file name's bytes that are not UTF-8: one way of writing them, for every layer.

References:

- PEP 383 ("Non-decodable Bytes in System Character Interfaces"): a byte that does
  not decode is carried as the lone surrogate U+DC00 + byte (``surrogateescape``),
  and ``os.fsencode`` gives the byte back; the standard library implements it.
- RFC 8259 section 8.1: JSON text exchanged between systems is UTF-8, which cannot
  encode a lone surrogate (Python's UTF-8 codec refuses it, ``strict``).
"""

from __future__ import annotations

import json
import os

import pytest

from slicetime.escapes import json_safe, unescaped
from slicetime.interfaces.report_source import encode
from slicetime.interfaces.safe_text import xml_safe

# a name as the file system gives it: "run" then the byte 0xff, which is not UTF-8
NAME = os.fsdecode(b"run\xff.nii")


def test_a_byte_that_is_not_utf8_is_written_as_its_escape() -> None:
    # PEP 383: the byte 0xff arrives as U+DCFF; UTF-8 cannot encode it (RFC 8259 needs it)
    assert NAME == "run\udcff.nii"
    with pytest.raises(UnicodeEncodeError):
        NAME.encode("utf-8")
    safe = json_safe({NAME: [NAME, 1]})
    assert safe == {"run\\xff.nii": ["run\\xff.nii", 1]}
    json.dumps(safe, ensure_ascii=False).encode("utf-8")  # now encodable


def test_every_writer_uses_the_same_escape() -> None:
    # the text and XML reports, the streamed JSON line and the provenance JSON agree
    assert xml_safe(NAME) == json_safe(NAME) == "run\\xff.nii"
    assert json.loads(encode({"path": NAME}))["path"] == "run\\xff.nii"


def test_a_recorded_name_reads_back_to_the_same_bytes() -> None:
    # PEP 383: os.fsencode turns the surrogate back into the original byte
    assert os.fsencode(unescaped(json_safe(NAME))) == b"run\xff.nii"
