"""``slicetime pin``: the dataset's protocol, as it is, written as a lab policy."""

from __future__ import annotations

import os
from pathlib import Path

import click

from slicetime.interfaces.commands.shared import (
    UserError,
    friendly,
    interrupted,
    starting,
    walking_options,
)
from slicetime.interfaces.screen import say


@click.command()
@click.argument("paths", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--output", type=click.Path(path_type=Path, dir_okay=False),
              help="Write the policy to this file (refused when it exists) instead of "
              "standard output.")
@walking_options("pin")
@friendly
def pin(paths: tuple[Path, ...], output: Path | None, include_derivatives: bool,
        include_sourcedata: bool, include_hidden: bool) -> None:
    """Write the protocol the runs under PATHS share as a lab policy (TOML).

    Per task and acquisition: the TR, slice count, scheme, multiband factor and
    slice encoding direction that a majority of the runs has; the runs that
    disagree are listed as comments under their entry. Review the file and keep
    it as slicetime-policy.toml at the dataset root: later deviations then fail
    the audit (policy/* findings). Nothing in the dataset is changed.
    """
    with starting("pin"):
        from slicetime.pipelines.pin import pin_protocols, policy_text
        from slicetime.pipelines.signals import test_point

    try:
        test_point("pin:audit")
        entries, untasked = pin_protocols(
            list(paths), include_derivatives=include_derivatives,
            include_sourcedata=include_sourcedata, include_hidden=include_hidden)
        text = policy_text(entries, ", ".join(p.as_posix() for p in paths), untasked)
    except KeyboardInterrupt:
        interrupted("while the runs were audited; no policy written")
    if output is None:
        try:
            test_point("pin:print")
            click.echo(text, nl=False)
        except KeyboardInterrupt:
            interrupted("while the policy was printed; what was printed may be cut short "
                        "(no file written)")
        return
    try:
        with open(output, "x", encoding="utf-8") as fh:  # never over an existing file
            try:
                test_point("pin:write")
                fh.write(text)
            except KeyboardInterrupt:
                fh.close()
                try:  # made by this open ("x"): a cut-short policy is no policy
                    os.unlink(output)
                except OSError:
                    interrupted(f"while the policy was written; {os.fspath(output)} may be "
                                "cut short: remove it")
                interrupted(f"while the policy was written; {os.fspath(output)} removed, "
                            "no policy written")
    except FileExistsError:
        raise UserError(f"{output}: already exists; pin writes a new file (remove it or "
                        "choose another name)") from None
    except OSError as exc:
        raise UserError(f"{output}: cannot write the policy ({exc.strerror or exc})") from None
    from slicetime.words import agree, count

    disagreeing = sum(len({p for p, _, _ in e.disagreeing}) for e in entries)
    written = sum(1 for e in entries if e.values)
    say(f"{os.fspath(output)}: {count(written, 'protocol')} written; "
        f"{count(disagreeing, 'run')} {agree(disagreeing, 'disagrees')} with them "
        "(listed in the file)", err=True)
