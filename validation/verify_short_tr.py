"""verify at short TR on the second simulator's tuning seeds (issue 24 follow-up).

Repeats the study behind ``docs/verify.md`` ("Short TR"): runs of
:mod:`validation.heldout_sim` at one TR, each verified against its true claim and one
wrong claim, tallied by signal family; ``--bands`` also prints, for every wrong claim,
the bootstrap z of the truth over the claim under the ordinary and the sign-invariant
score and the share of that lead in four frequency bands. ``--taper`` and
``--threshold`` change the engine's taper share and contradiction threshold for the
run (what was tried). Seeds from 1000 up are the reporting range and are refused
unless ``--report-seeds`` is given.

    python validation/verify_short_tr.py --seeds 0:3 --families realistic \\
        --volumes 290,292,294,296,298,301,303,305,307,309 --bands
"""

from __future__ import annotations

import argparse
import sys
import zlib
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from validation import heldout_sim as hs
from validation.verify_heldout import Trial, trials

if TYPE_CHECKING:
    from slicetime.pipelines.verify import Channels

#: frequency bands (Hz) of the lead's share in ``--bands``
BANDS = ((0.0, 0.1), (0.1, 0.2), (0.2, 0.4), (0.4, 10.0))


def _band_line(trial: Trial, channels: Channels, truth: Sequence[float],
               claim: Sequence[float]) -> str:
    from slicetime.engines import verify as ev
    from slicetime.pipelines.verify import candidates

    listed = candidates(claim, trial.repetition_time)
    near = [i for i, c in enumerate(listed)
            if ev.schedule_distance(c.times, truth) < 0.02 * trial.repetition_time]
    if not near:
        return "truth not among the candidates"
    first, second = ev.gather_both(channels.courses, channels.slice_of, channels.region_of,
                                   trial.repetition_time, listed, seed=trial.seed)
    parts = []
    for evidence, label, scale in ((first, "ordinary", 1.0), (second, "sign-invariant", 0.5)):
        diff = evidence.bins.total[near[0]] - evidence.bins.total[0]
        block = ev.bin_block(evidence.spectra.freqs)
        replicates = ev.block_bootstrap(diff[None, :], block, seed=trial.seed)[:, 0]
        sd = float(np.std(replicates, ddof=1))
        freqs = evidence.spectra.freqs * scale
        total = abs(float(diff.sum())) or 1.0
        shares = " ".join(f"{diff[(freqs >= lo) & (freqs < hi)].sum() / total:5.2f}"
                          for lo, hi in BANDS)
        parts.append(f"{label} z {float(diff.mean()) / sd if sd > 0 else 0.0:5.2f} "
                     f"[{shares}]")
    return " | ".join(parts)


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--seeds", default="0:3", help="first:last (exclusive)")
    parser.add_argument("--families", default=",".join(hs.FAMILIES))
    parser.add_argument("--tr", type=float, default=0.8, help="one of the study's TRs")
    parser.add_argument("--volumes", default="300")
    parser.add_argument("--taper", type=float, default=None, help="taper share (1 = Hann)")
    parser.add_argument("--threshold", type=float, default=None, help="Z_CONTRADICT")
    parser.add_argument("--bands", action="store_true")
    parser.add_argument("--report-seeds", action="store_true",
                        help="allow seeds from 1000 up (the reporting range)")
    args = parser.parse_args(argv)
    first, last = (int(x) for x in args.seeds.split(":"))
    if last > 1000 and not args.report_seeds:
        parser.error("seeds from 1000 up are for reporting; add --report-seeds")
    from slicetime.engines import verify as ev
    from slicetime.engines import verify_signal as vs
    from slicetime.pipelines.verify import array_courses, candidates

    if args.taper is not None:
        vs.TAPER_FRACTION = args.taper
    if args.threshold is not None:
        ev.Z_CONTRADICT = args.threshold
    design = [t for t in trials(range(first, last), args.families.split(","),
                                [int(v) for v in args.volumes.split(",")])
              if t.repetition_time == args.tr]
    tally: dict[str, list[int]] = {}
    highest = -np.inf
    for trial in design:
        truth = hs.order_times(trial.n_slices, trial.repetition_time, trial.order,
                               trial.multiband)
        claim = truth if trial.mistake is None else hs.wrong_claim(
            trial.n_slices, trial.repetition_time, trial.order, trial.multiband,
            trial.mistake)
        assert claim is not None
        seed = trial.seed * 7919 + int(trial.repetition_time * 100) + trial.volumes
        run = hs.simulate(trial.family, truth, trial.repetition_time, trial.volumes,
                          seed + zlib.crc32(trial.family.encode()) % 1000)
        channels = array_courses(run.data)
        listed = candidates(claim, trial.repetition_time)
        decision = ev.evaluate(channels.courses, channels.slice_of, trial.repetition_time,
                               listed, trial.repetition_time, seed=trial.seed,
                               region_of=channels.region_of)
        row = tally.setdefault(trial.family, [0, 0, 0, 0, 0])
        if trial.mistake is None:
            row[0] += 1
            row[1] += decision.verdict == "contradicted"
            row[2] += decision.verdict == "supported"
            highest = max(highest, decision.z_rival if decision.z_rival is not None else -np.inf)
        else:
            row[3] += 1
            row[4] += decision.verdict == "contradicted"
            if args.bands:
                print(f"{trial.family} {trial.order} x{trial.multiband} {trial.mistake}: "
                      f"{_band_line(trial, channels, truth, claim)}", flush=True)
    print("family: true claims (contradicted, supported); wrong claims contradicted")
    for family, (n_true, fa, sup, n_wrong, caught) in sorted(tally.items()):
        print(f"  {family}: {n_true} ({fa}, {sup}); {caught}/{n_wrong}")
    print(f"highest z of an alternative over a true claim: {highest:.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
