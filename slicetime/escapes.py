"""How a file name's bytes that are not UTF-8 are written, for every layer.

Python carries such bytes as lone surrogates (``surrogateescape``), which no UTF-8
output can hold. Reports (``interfaces.safe_text``, ``interfaces.report_source``) and
the provenance records of corrected runs (``pipelines.provenance``) write each as the
visible escape ``\\xNN`` (another lone surrogate as ``\\uXXXX``), and
:func:`unescaped` reads a recorded name back. Pure: no I/O.
"""

from __future__ import annotations

import re
from typing import Any

#: a lone surrogate: a file-name byte that is not UTF-8, or a broken string
SURROGATE = re.compile("[\ud800-\udfff]")
_ESCAPED_BYTE = re.compile(r"\\x([89a-f][0-9a-f])")


def escape_surrogate(match: re.Match[str]) -> str:
    """The visible escape of one matched lone surrogate: ``\\xNN`` for a file-name
    byte (U+DC80..U+DCFF), else ``\\uXXXX``."""
    code = ord(match.group(0))
    if 0xDC80 <= code <= 0xDCFF:  # a file-name byte that is not UTF-8 (surrogateescape)
        return f"\\x{code - 0xDC00:02x}"
    return f"\\u{code:04x}"


def json_safe(value: Any) -> Any:
    """Every string of a JSON-like value (keys too, recursively) encodable as UTF-8:
    each lone surrogate replaced by its visible escape. JSON escapes control
    characters itself, so nothing else changes."""
    if isinstance(value, str):
        return SURROGATE.sub(escape_surrogate, value) if SURROGATE.search(value) else value
    if isinstance(value, dict):
        return {json_safe(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_safe(v) for v in value]
    return value


def unescaped(text: str) -> str:
    """The file name behind a :func:`json_safe` text (``\\xNN`` back to its byte)."""
    return _ESCAPED_BYTE.sub(lambda m: chr(0xDC00 + int(m.group(1), 16)), text)
