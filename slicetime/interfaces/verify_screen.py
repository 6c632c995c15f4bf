"""The text screen of ``slicetime verify``: one line per run (verdict and file), at most
one indented line of reason in plain words (the order named, how strong the evidence
is), and a summary line. Numbers stay in ``--format json``.

Lines fit the width :func:`slicetime.interfaces.screen.width_for` gives (paths are
shortened in the middle, a reason too long for its line ends in an ellipsis); with no
width (piped output) nothing is cut. Pure: outcomes in, lines out.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING

from slicetime.interfaces.safe_text import xml_safe
from slicetime.interfaces.screen import FINDING_INDENT, ellipsis, shorten_path
from slicetime.words import count

if TYPE_CHECKING:
    from slicetime.pipelines.verify import VerifyOutcome

#: verdict words, padded to one column
VERDICT_PAD = len("contradicted") + 2


def reason_parts(outcome: VerifyOutcome) -> list[str]:
    """The reason of one run's verdict in plain words (no scores), most important part
    first: a narrow screen drops the later parts rather than cut a word."""
    finding = outcome.finding
    evidence = dict(finding.evidence or {})
    verdict = finding.code.split("/")[1]
    strength = evidence.get("strength")
    claimed = evidence.get("claimed_order") or outcome.claimed_label
    how = f" ({strength} evidence)" if strength else ""
    if verdict == "contradicted":
        if evidence.get("already_corrected"):
            return [f"looks already slice-time corrected{how}", f"; claimed: {claimed}"]
        return [f"fits {evidence.get('best_order')}{how}", f"; claimed: {claimed}"]
    if verdict == "supported":
        return [f"fits the claimed order{how}", f": {claimed}"]
    if outcome.decision is None:
        return [str(evidence.get("reason") or "")]
    # the plain reason is the message's tail after the claimed order
    return [finding.message.rsplit("): ", 1)[-1]]


def reason_line(outcome: VerifyOutcome, room: int | None = None, *, unicode: bool = True
                ) -> str:
    """The reason parts that fit ``room`` columns (the first always, shortened if need be)."""
    parts = [p for p in reason_parts(outcome) if p]
    if not parts:
        return ""
    text = parts[0]
    for part in parts[1:]:
        if room is not None and len(text) + len(part) > room:
            break
        text += part
    return _fit(text, room, unicode)


def _fit(text: str, room: int | None, unicode: bool) -> str:
    if room is None or len(text) <= room:
        return text
    dots = ellipsis(unicode)
    return text[:max(room - len(dots), 1)].rstrip() + dots


def run_lines(outcome: VerifyOutcome, width: int | None, *, unicode: bool = True
              ) -> list[str]:
    """The line (verdict, file) and the indented reason line of one run."""
    verdict = outcome.finding.code.split("/")[1]
    room = None if width is None else width - VERDICT_PAD
    path = xml_safe(outcome.path)  # a name's control characters and non-UTF-8 bytes escaped
    head = f"{verdict:<{VERDICT_PAD}}{shorten_path(path, room, unicode=unicode)}"
    inner = None if width is None else width - FINDING_INDENT
    reason = reason_line(outcome, inner, unicode=unicode)
    lines = [head]
    if reason:
        lines.append(" " * FINDING_INDENT + reason)
    return lines


def unreadable_lines(file: str, message: str, width: int | None, *, unicode: bool = True
                     ) -> list[str]:
    room = None if width is None else width - VERDICT_PAD
    shown = shorten_path(xml_safe(file), room, unicode=unicode)
    lines = [f"{'unreadable':<{VERDICT_PAD}}{shown}"]
    inner = None if width is None else width - FINDING_INDENT
    tail = message.split(": ", 1)[-1] if message.startswith(file) else message
    lines.append(" " * FINDING_INDENT + _fit(xml_safe(tail), inner, unicode))
    return lines


def summary_line(verdicts: Sequence[str], unreadable: int) -> str:
    """``3 runs: 1 supported, 1 contradicted, 1 undecidable`` (verdicts that occur)."""
    from slicetime.interfaces.report_json import VERDICTS

    parts = [f"{verdicts.count(v)} {v}" for v in VERDICTS if verdicts.count(v)]
    if unreadable:
        parts.append(f"{unreadable} unreadable")
    return f"{count(len(verdicts) + unreadable, 'run')}: {', '.join(parts) or 'none'}"


__all__ = ["reason_line", "reason_parts", "run_lines", "summary_line", "unreadable_lines"]
