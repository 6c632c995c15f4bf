"""``slicetime explain CODE`` (or ``--list``): the documentation of finding codes."""

from __future__ import annotations

import sys
from typing import Any

import click

from slicetime.interfaces.commands.shared import UserError, friendly, interruptible


def _complete_codes(ctx: click.Context, param: click.Parameter, incomplete: str
                    ) -> list[Any]:
    """Shell completion of CODE: the registered finding codes."""
    from click.shell_completion import CompletionItem

    from slicetime.rules import RULES

    return [CompletionItem(code) for code in sorted(RULES) if code.startswith(incomplete)]


@click.command()
@click.argument("code", required=False, shell_complete=_complete_codes)
@click.option("--list", "list_all", is_flag=True, help="List every finding code.")
@friendly
@interruptible("while the documentation was printed; explain writes no file (what was "
               "printed may be cut short)", "explain:start")
def explain(code: str | None, list_all: bool) -> None:
    """Print the documentation of a finding CODE (or --list them all)."""
    from slicetime.interfaces.screen import say, width_for, wrap_words  # say: ASCII mode too
    from slicetime.rules import RULES
    from slicetime.rules import explain as explain_rule

    width = width_for(sys.stdout)
    if list_all or code is None:
        code_width = max(len(c) for c in RULES)
        lead = code_width + 2 + 7 + 2
        for rule in sorted(RULES.values(), key=lambda r: r.code):
            head = f"{rule.code:<{code_width}}  {rule.severity.value:<7}  "
            if width is not None and width - lead < 30:  # narrow: the title under the code
                say(f"{rule.code}  {rule.severity.value}")
                for part in wrap_words(rule.title, width, first=4, rest=4):
                    say("    " + part)
                continue
            parts = wrap_words(rule.title, width, first=lead, rest=lead)
            say(head + parts[0])
            for part in parts[1:]:
                say(" " * lead + part)
        return
    known = _known_code(code, RULES)
    if known is None:
        near = _close_codes(code, list(RULES))
        extra = f"; did you mean {', '.join(near)}?" if near else ""
        raise UserError(f"explain: no finding code {code!r}{extra} (see slicetime explain --list)")
    if known != code:
        say(f"{code} is the former name of {known} (still accepted in lab policies)")
    for paragraph in explain_rule(known).split("\n"):
        hanging = 2 if paragraph.endswith(":") or ": " in paragraph[:24] else 0
        for i, part in enumerate(wrap_words(paragraph, width, rest=hanging)):
            say(("" if i == 0 else " " * hanging) + part)


def _known_code(code: str, rules: Any) -> str | None:
    """The registered code ``code`` names: itself, or the code a former name became."""
    from slicetime.rules.registry import current_code

    current = current_code(code)
    return current if current in rules else None


def _close_codes(code: str, known: list[str]) -> list[str]:
    """Codes close to a mistyped one: spelling (difflib) after normalising case and
    separators, then codes containing its short name."""
    import difflib

    typed = code.strip().lower().replace("_", "-").replace(" ", "-").replace(".", "/")
    if typed in known:
        return [typed]
    short = typed.split("/")[-1]

    def score(candidate: str) -> float:
        ratio = difflib.SequenceMatcher(None, typed, candidate).ratio()
        return ratio + (1.0 if short and candidate.split("/")[-1] == short else 0.0)

    near = set(difflib.get_close_matches(typed, known, n=3, cutoff=0.6))
    near.update(c for c in known if short and c.split("/")[-1] == short)
    return sorted(near, key=lambda c: (-score(c), c))[:3]
