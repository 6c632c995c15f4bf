"""``slicetime fix PATHS``: repair slice-timing metadata (a dry run unless --apply;
--undo restores from a journal)."""

from __future__ import annotations

import shlex
import sys
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import TYPE_CHECKING, NoReturn

import click

from slicetime.interfaces.commands.shared import (
    JOBS_LIGHT,
    UserError,
    executor_options,
    friendly,
    interrupted,
    on_interrupt,
    policy_option,
    run_executor,
    say_finished_despite_interrupt,
    source_options,
    source_settings,
    starting,
)
from slicetime.interfaces.screen import say

if TYPE_CHECKING:
    from slicetime.model import Finding
    from slicetime.pipelines.fix import FixPlan
    from slicetime.pipelines.transaction import ApplyResult


@click.command()
@click.argument("paths", nargs=-1, type=click.Path(path_type=Path))
@click.option("--apply", "do_apply", is_flag=True,
              help="Write the changes (default: only show them). Each file is backed up first.")
@click.option("--backup-dir", type=click.Path(path_type=Path, file_okay=False),
              help="Where --apply keeps the originals and the journal (default: a "
              "<dataset>-slicetime-backups folder beside the dataset).")
@click.option("--undo", "undo_journal", type=click.Path(path_type=Path, dir_okay=False),
              help="Restore the files a journal (from an earlier --apply) records.")
@click.option("--plan", "plan_file", type=click.Path(path_type=Path, dir_okay=False),
              help="Without --apply: save the plan to this file. With --apply: apply exactly "
              "this saved plan (files changed since it was made are refused).")
@click.option("--per-run", is_flag=True,
              help="Write every repair into the run's own sidecar, never into an inherited one.")
@click.option("--consolidate", "consolidate", multiple=True, metavar="FIELD",
              help="Move FIELD, when every run of a task and acquisition has the same value in "
              "its own sidecar, into one top-level sidecar (repeatable).")
@click.option("--spread", "spread", multiple=True, metavar="FIELD",
              help="The reverse: copy FIELD from the shared sidecar that gives it into each "
              "run's own sidecar and remove it there (repeatable).")
@click.option("--replace-links", is_flag=True,
              help="Replace a sidecar that is a symbolic link (annexed) by a regular file "
              "instead of refusing it.")
@click.option("--rewrite-read-only", is_flag=True,
              help="Rewrite sidecars that have no write permission (they stay read-only) "
              "instead of refusing them.")
@policy_option("Its expected protocols can rebuild missing timing.")
@executor_options(default=JOBS_LIGHT)
@source_options(purpose="Used to rebuild timing from sourcedata/.")
@friendly
def fix(
    paths: tuple[Path, ...],
    do_apply: bool,
    backup_dir: Path | None,
    undo_journal: Path | None,
    plan_file: Path | None,
    per_run: bool,
    consolidate: tuple[str, ...],
    spread: tuple[str, ...],
    replace_links: bool,
    rewrite_read_only: bool,
    policy_file: Path | None,
    jobs: int | None,
    scheduler: str | None,
    source_check: bool | None,
    source_map: Path | None,
) -> None:
    """Repair slice-timing metadata in sidecars: a dry run unless --apply.

    \b
    Exit status: 0 nothing to do (or everything applied / restored); 1 changes
    are planned (dry run), a fixable finding is not planned (listed with the
    reason), or some files were refused; 2 bad usage.
    \b
    Examples:
      slicetime fix ds/            # show the planned changes as diffs
      slicetime fix ds/ --apply    # write them, with backups and a journal
      slicetime fix --undo ds-slicetime-backups/<UTC time>/journal.json
      slicetime fix --undo JOURNAL ds-copy/  # the dataset moved or copied
    \b
    Backups go to <dataset>-slicetime-backups/<UTC time stamp>/ beside the
    dataset (or --backup-dir); --apply prints the journal's exact path. Ctrl-C
    during --apply puts back what was written; after a kill, the next fix or
    undo does.
    """
    with starting("fix"):
        from slicetime.interfaces.safe_text import xml_safe
        from slicetime.interfaces.terminal import make_console, render_fix_plan
        from slicetime.pipelines import fix as fixing
        from slicetime.pipelines.signals import test_point

        console = make_console()
    try:
        if undo_journal is not None:
            if len(paths) > 1 or do_apply:
                raise UserError("--undo takes the journal and at most one PATH (the dataset, "
                                "when it was moved or copied), and no --apply")
            _fix_undo(undo_journal, paths[0] if paths else None)
        if do_apply and plan_file is not None:
            if paths:
                raise UserError("--apply --plan FILE applies the saved plan; give no PATH")
            with on_interrupt("while the saved plan was read; nothing was written",
                              "fix:read-plan"):
                plan = fixing.read_plan(plan_file)
                fixing.check_policies(plan, policy_file)
        else:
            with on_interrupt("before the plan was made; nothing was written (an earlier "
                              "interrupted apply being put back is finished by the next fix)",
                              "fix:inputs"):
                _check_inputs(paths, plan_file if not do_apply else None, backup_dir,
                              [policy_file, source_map])
            try:
                with run_executor(jobs, scheduler) as executor:
                    test_point("fix:plan")
                    plan = fixing.plan_fix(list(paths), per_run=per_run,
                                           policy_file=policy_file, executor=executor,
                                           consolidate=consolidate, spread=spread,
                                           source=source_settings(source_check, source_map))
            except KeyboardInterrupt:  # the audit for the plan: nothing is written yet
                interrupted("while the runs were audited for the plan; nothing was written")
            with on_interrupt("while the plan was checked or shown (what was printed may be "
                              "cut short); nothing was written", "fix:show"):
                # the dry run names what --apply would refuse (one refusal writes nothing)
                plan.notes.extend(f"--apply would refuse it, and then write nothing: {line}"
                                  for line in fixing.preflight(plan, replace_links,
                                                               rewrite_read_only))
                hint = None
                if not do_apply and plan_file is None:
                    given = " ".join(shlex.quote(xml_safe(str(p))) for p in paths)
                    hint = f"to write them: slicetime fix {given} --apply"
                render_fix_plan(plan, console, apply_hint=hint)
        if not do_apply:
            if plan_file is not None:
                with on_interrupt(f"while the plan was saved; {xml_safe(plan_file)} not "
                                  "written, nothing in the dataset changed", "fix:save"):
                    fixing.write_plan(plan, plan_file)
                say(f"plan saved to {xml_safe(plan_file)}; apply it with: slicetime fix "
                    f"--apply --plan {xml_safe(plan_file)}")
            sys.exit(1 if plan.changes or plan.unplanned else 0)
        if not plan.changes:
            sys.exit(1 if plan.unplanned else 0)
        # the apply notes signals itself (nothing written, or everything put back);
        # a Ctrl-C here comes before it started
        with on_interrupt("before anything was written; nothing was written"):
            applied = fixing.apply_plan(plan, backup_dir=backup_dir,
                                        replace_links=replace_links,
                                        rewrite_read_only=rewrite_read_only)
    except fixing.Interrupted as exc:  # the files written were put back
        say(f"slicetime: {xml_safe(str(exc))}", err=True)
        sys.exit(exc.exit_code)
    except fixing.TransactionError as exc:  # FixError and the transaction's refusals
        raise UserError(xml_safe(str(exc))) from None
    except OSError as exc:
        where = f"{exc.filename}: " if exc.filename else ""
        raise UserError(xml_safe(f"{where}cannot write ({exc.strerror or exc}); nothing in "
                                 "the dataset was changed")) from None
    _finish_apply(plan, applied, lambda: fixing.reaudit(
        plan, policy_file=policy_file, source=source_settings(source_check, source_map)))


def _check_inputs(paths: tuple[Path, ...], plan_out: Path | None, backup_dir: Path | None,
                  inputs: list[Path | None]) -> None:
    """Before any planning: PATHs given, no output that would overwrite an input, PATHs
    that hold runs; a transaction a kill interrupted in one of their datasets is
    finished first (``fixing.recover``), with a line on stderr for each file."""
    from slicetime.interfaces.safe_text import xml_safe
    from slicetime.pipelines import fix as fixing
    from slicetime.pipelines.audit import check_paths_hold_runs
    from slicetime.readers.dataset import check_writes, find_root

    if not paths:
        raise UserError("fix: give the dataset or runs to repair (PATH...)")
    check_writes(list(paths), {"--plan": plan_out}, folders={"--backup-dir": backup_dir},
                 inputs=inputs)
    check_paths_hold_runs(list(paths))
    for line in fixing.recover([str(find_root(p)) for p in paths]):
        say(f"slicetime: {xml_safe(line)}", err=True)


def _finish_apply(plan: FixPlan, applied: ApplyResult,
                  reaudit: Callable[[], list[Finding]]) -> NoReturn:
    """After ``--apply`` wrote its files: what was written, refused and recovered, where
    the journal is, then the re-audit of the repaired runs; exits (1 when something was
    refused or not planned, 130 after a Ctrl-C that stopped the re-audit)."""
    from slicetime.interfaces.safe_text import xml_safe
    from slicetime.pipelines.signals import signals_noted, test_point
    from slicetime.words import agree, count

    code = 1 if applied.refused or plan.unplanned else 0
    with signals_noted() as noted:  # the files are written: this summary is printed whole
        test_point("fix:summary")
        _say("slicetime: ", applied.recovered, err=True)
        _say("written   ", applied.written)
        _say("refused   ", applied.refused)
        if applied.refused:
            say(f"nothing was written: {len(applied.refused)} of {len(plan.changes)} files "
                "would be refused, and a plan is applied whole or not at all")
        if applied.journal is not None:
            _say_journal(xml_safe(applied.journal))
    # a Ctrl-C while the summary was printed, or after the apply's last file (while its
    # journal was finished and its locks released)
    late = bool(noted) or applied.late_signal
    if not applied.written or applied.journal is None:
        if late:
            say_finished_despite_interrupt("the apply")
        sys.exit(code)
    # the re-audit is what is left: a Ctrl-C before or during it stops there, and says so
    undo = f"slicetime fix --undo {xml_safe(applied.journal)}"
    n = len(applied.written)
    stopped = f"the {count(n, 'file')} above {agree(n, 'was')} written (undo with: {undo})"
    if late:
        interrupted(f"before the re-audit; {stopped}")
    try:
        test_point("fix:reaudit")
        left = reaudit()
    except KeyboardInterrupt:
        interrupted(f"during the re-audit (not finished); {stopped}")
    with signals_noted() as noted:
        for finding in left:
            say(f"still     {xml_safe(finding.one_line())}")
        if not left:
            say("re-audit: the repaired runs are clean for the repaired codes")
    if noted:
        say_finished_despite_interrupt("fix --apply")
    sys.exit(code)


def _say_journal(journal: str) -> None:
    """Where the backups and the journal are, and the undo command, each whole (a path
    is copied from here): too long for the screen, it goes on its own line."""
    from slicetime.interfaces import screen

    width = screen.width_for(sys.stdout)
    for label, value in (("backups and journal:", journal),
                         ("undo with:", f"slicetime fix --undo {journal}")):
        if width is None or len(label) + 1 + len(value) <= width:
            say(f"{label} {value}")
        else:
            say(f"{label}\n  {value}")


def _say(label: str, items: Iterable[str], note: str = "", *, err: bool = False) -> None:
    """One line per item: ``label``, the item made safe to print, then ``note``."""
    from slicetime.interfaces.safe_text import xml_safe

    for item in items:
        say(f"{label}{xml_safe(item)}{note}", err=err)


def _fix_undo(journal: Path, at: Path | None) -> None:
    """``fix --undo JOURNAL [PATH]``: restore (the dataset at PATH when it was moved or
    copied), then say exactly what was and was not done."""
    from slicetime.interfaces.safe_text import xml_safe
    from slicetime.pipelines import fix as fixing

    try:
        with on_interrupt("while the journal was read, before any file was restored; "
                          "nothing was restored", "undo:read"):
            undone = fixing.undo(journal, at)
    except OSError as exc:
        raise UserError(xml_safe(f"{journal}: cannot undo ({exc.strerror or exc}); nothing "
                                 "was restored")) from None
    _say("slicetime: ", undone.recovered, err=True)
    _say("restored  ", undone.restored)
    _say("unchanged ", undone.already, "  (already restored)")
    _say("unchanged ", undone.never_written, "  (never written: the apply stopped before it)")
    _say("refused   ", undone.refused)
    if undone.failure is not None:
        say(f"slicetime: {xml_safe(undone.failure)}", err=True)
        sys.exit(2)
    if undone.signal is not None:  # stopped between two files, each restored whole
        from slicetime.words import agree, count

        n = len(undone.restored)
        interrupted(f"after {count(n, 'file')} {agree(n, 'was')} restored (listed above); "
                    f"{count(undone.left, 'file')} not restored yet: run the same undo again")
    if undone.late_signal:
        say_finished_despite_interrupt("the undo")
    sys.exit(1 if undone.refused else 0)
