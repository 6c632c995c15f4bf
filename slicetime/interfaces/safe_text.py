"""Make strings from file names and file contents safe to print and to encode.

File names may hold control characters (which can retitle or clear a
terminal) and bytes that are not UTF-8 (which Python carries as lone
surrogates, unencodable on output). Reports pass every such string through
:func:`xml_safe` (one line, XML 1.0 and terminal safe) or ``escapes.json_safe`` (JSON
values, recursively: only the lone surrogates need escaping there).
"""

from __future__ import annotations

import re

from slicetime.escapes import escape_surrogate

# Characters XML 1.0 cannot hold (outside Char), plus DEL and C1 controls, which
# it allows but which are invisible and unsafe on terminals that display reports.
# Bidirectional controls (Unicode TR 9: U+061C, U+200E/F, U+202A-202E, U+2066-2069) reorder
# the text around them on screen, so a name can show as another; line and paragraph
# separators (U+2028/9) break lines. They become escapes too.
_BIDI = "\u061c\u200e\u200f\u2028\u2029\u202a-\u202e\u2066-\u2069"
_UNSAFE_TEXT = re.compile(
    f"[\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f{_BIDI}\ud800-\udfff\ufffe\uffff]"
)
_UNSAFE_LINE = re.compile(f"[\x00-\x1f\x7f-\x9f{_BIDI}\ud800-\udfff\ufffe\uffff]")
_NAMED = {"\t": "\\t", "\n": "\\n", "\r": "\\r"}


def escape_char(match: re.Match[str]) -> str:
    """The visible backslash escape of one matched unsafe character."""
    char = match.group(0)
    if char in _NAMED:
        return _NAMED[char]
    code = ord(char)
    if 0xD800 <= code <= 0xDFFF:  # a lone surrogate: a file-name byte that is not UTF-8
        return escape_surrogate(match)
    if code <= 0xFF:
        return f"\\x{code:02x}"
    return f"\\u{code:04x}"


def xml_safe(text: object, *, one_line: bool = True) -> str:
    """``text`` as a string that XML 1.0 can hold and UTF-8 can encode.

    Unsafe characters become visible backslash escapes; with ``one_line``
    tabs and line breaks do too (use it for attributes and single fields).
    """
    value = text if isinstance(text, str) else str(text)
    return (_UNSAFE_LINE if one_line else _UNSAFE_TEXT).sub(escape_char, value)
