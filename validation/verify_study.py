"""The verify study: how often ``slicetime verify`` gets the verdict right on simulated runs
that carry real-life physiology.

Runs come from :class:`slicetime.pipelines.simulate.BrainRun`, a generator written for
this study and independent of the verify code: a task response with regional latency
differences, slow network and global fluctuations, drift, respiration (0.2-0.35 Hz) and
cardiac pulsation (0.9-1.3 Hz) whose rates wander and whose spatial maps differ,
motion-like events and AR(1) noise, each voxel sampled at its slice's own time, so
physiology aliases as it does in a scanner. Parameters are drawn at random (seeded)
across repetition time, run length, SNR, physiology amplitude, slice count, multiband
factor and true order. Every run is verified against its true schedule and against one
wrong claim (reversed, axis flipped, sequential for interleaved and back, wrong
multiband factor, wrong start). Runs without shared signal must come out undecidable.

Writes ``docs/verify.md``, ``docs/verify.json`` and ``docs/figures/verify-*.svg``.
``--quick`` runs a reduced design in a minute or two. All data are invented.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from collections import Counter
from collections.abc import Iterable, Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from slicetime.engines import verify as ev
from slicetime.pipelines.simulate import BrainRun, simulate_brain
from slicetime.pipelines.verify import verify_array
from slicetime.schemes.generate import Protocol, array_times

INPLANE = 24  # 24 x 24 voxels per slice, an elliptical brain of about 340 voxels
TRS = (0.8, 1.5, 2.0, 2.5)
LENGTHS = (150, 300, 600)
NOISE = {"high": 1.0, "medium": 2.0, "low": 4.0}  # voxel noise sd, % (tSNR 100, 50, 25)
PHYSIO = {"low": (0.1, 0.2), "medium": (0.3, 0.5), "high": (0.7, 1.0)}  # % of baseline
ORDERS = ("ascending", "descending", "interleaved from 0", "interleaved from 1",
          "interleaved descending")
MISTAKES = ("direction reversed", "axis flipped", "sequential for interleaved",
            "interleaved for sequential", "wrong multiband", "wrong start")
#: slice counts and multiband factors by TR (what such protocols typically use)
LAYOUTS = {0.8: ((36, 3), (48, 4), (40, 4), (48, 6)), 1.5: ((36, 1), (48, 2), (40, 2), (30, 1)),
           2.0: ((30, 1), (36, 1), (40, 1), (48, 2)), 2.5: ((36, 1), (40, 1), (44, 1), (48, 2))}


def scheme_times(n: int, window: float, order: str, multiband: int) -> tuple[float, ...]:
    groups = n // multiband
    if order == "ascending":
        p = Protocol(n, "sequential", True, multiband=multiband, repetition_time=window)
    elif order == "descending":
        p = Protocol(n, "sequential", False, multiband=multiband, repetition_time=window)
    elif order == "interleaved from 0":
        p = Protocol(n, "interleaved", True, 2, 0, multiband, repetition_time=window)
    elif order == "interleaved from 1":
        p = Protocol(n, "interleaved", True, 2, 1, multiband, repetition_time=window)
    elif order == "interleaved descending":
        p = Protocol(n, "interleaved", False, 2, groups - 1, multiband, repetition_time=window)
    else:
        raise ValueError(order)
    return array_times(p)


def wrong_claim(n: int, window: float, order: str, multiband: int, mistake: str
                ) -> tuple[float, ...] | None:
    """The claimed schedule for a mistake, or None when it does not apply."""
    truth = scheme_times(n, window, order, multiband)
    interleaved = order.startswith("interleaved")
    if mistake == "axis flipped":
        claim = truth[::-1]
    elif mistake == "direction reversed":
        other = {"ascending": "descending", "descending": "ascending",
                 "interleaved from 0": "interleaved descending",
                 "interleaved from 1": "interleaved descending",
                 "interleaved descending": "interleaved from 0"}[order]
        claim = scheme_times(n, window, other, multiband)
    elif mistake == "sequential for interleaved":
        if not interleaved:
            return None
        claim = scheme_times(n, window, "ascending", multiband)
    elif mistake == "interleaved for sequential":
        if interleaved:
            return None
        claim = scheme_times(n, window, "interleaved from 0", multiband)
    elif mistake == "wrong start":
        swap = {"interleaved from 0": "interleaved from 1",
                "interleaved from 1": "interleaved from 0"}
        if order not in swap:
            return None
        claim = scheme_times(n, window, swap[order], multiband)
    elif mistake == "wrong multiband":
        if multiband > 1:
            other_mb = 1
        else:
            other_mb = next((m for m in (2, 3, 4) if n % m == 0), 0)
            if not other_mb:
                return None
        claim = scheme_times(n, window, order, other_mb)
    else:
        raise ValueError(mistake)
    if ev.schedule_distance(claim, truth) < ev.EQUIVALENT_FRACTION * window:
        return None  # the mistake changes nothing here (e.g. a flip of a symmetric order)
    return claim


@dataclass(frozen=True)
class Case:
    tr: float
    n_slices: int
    multiband: int
    volumes: int
    snr: str
    physio: str
    respiration: float
    cardiac: float
    order: str
    mistake: str
    seed: int
    signal: str = "brain"  # brain | noise | voxelwise | physio-only | a key of STRESS


@dataclass(frozen=True)
class Outcome:
    case: Case
    claim: str  # "true" or the mistake
    verdict: str
    rival: str | None
    rival_is_truth: bool
    effect: float | None
    z_rival: float | None
    p_evidence: float
    seconds: float
    z_signs: float | None = None


#: stress tests with weak neural signal (task 0.1 %, network 0.1 %): respiration sign
#: pattern along the slice axis, cardiac sign pattern (None: no cardiac pulsation), and a
#: delay of both growing along the slice axis (s)
STRESS: dict[str, tuple[str, str | None, float]] = {
    "flipped": ("halves", None, 0.0),
    "alternating": ("alternating", "alternating", 0.0),
    "gradient": ("gradient", "halves", 0.0),
    "random-signs": ("random", "random", 0.0),
    "delays": ("halves", "thirds", 0.3),
}


def simulate_case(case: Case) -> np.ndarray:
    truth = scheme_times(case.n_slices, case.tr, case.order, case.multiband)
    neural = case.signal == "brain"
    if case.signal in STRESS:
        resp_signs, card_signs, delay = STRESS[case.signal]
        sim = BrainRun(
            shape=(INPLANE, INPLANE, case.n_slices, case.volumes), repetition_time=case.tr,
            slice_times=truth, task=0.1, network=0.1, global_signal=0.0,
            respiration=case.respiration, cardiac=0.0 if card_signs is None else case.cardiac,
            noise=NOISE[case.snr], respiration_signs=resp_signs,
            cardiac_signs=card_signs or "none", physio_delay=delay, seed=case.seed)
        return simulate_brain(sim)
    sim = BrainRun(
        shape=(INPLANE, INPLANE, case.n_slices, case.volumes), repetition_time=case.tr,
        slice_times=truth, task=0.5 if neural else 0.0, network=0.4 if neural else 0.0,
        global_signal=0.2 if neural else 0.0, drift=0.5 if neural else 0.0,
        respiration=case.respiration if case.signal in ("brain", "physio-only") else 0.0,
        cardiac=case.cardiac if case.signal in ("brain", "physio-only") else 0.0,
        events_per_100=1.0 if neural else 0.0, noise=NOISE[case.snr],
        ar1=0.9 if case.signal == "voxelwise" else 0.3, seed=case.seed)
    return simulate_brain(sim)


def run_case(case: Case) -> list[Outcome]:
    data = simulate_case(case)
    truth = scheme_times(case.n_slices, case.tr, case.order, case.multiband)
    claims = [("true", truth)]
    wrong = wrong_claim(case.n_slices, case.tr, case.order, case.multiband, case.mistake)
    if wrong is not None:
        claims.append((case.mistake, wrong))
    out = []
    for name, claim in claims:
        start = time.perf_counter()
        decision = verify_array(data, claim, case.tr, seed=case.seed)
        seconds = time.perf_counter() - start
        rival = decision.rival_times
        is_truth = rival is not None and ev.schedule_distance(rival, truth) < 1e-6
        out.append(Outcome(case, name, decision.verdict, decision.rival_name, is_truth,
                           decision.effect, decision.z_rival, decision.p_evidence, seconds,
                           decision.z_signs))
    return out


def _stress_seed(signal: str) -> int:
    if signal in ("noise", "voxelwise", "physio-only", "flipped"):
        return 50_000 + 1000 * len(signal)  # the seeds of the earlier study
    return 60_000 + 1000 * list(STRESS).index(signal)


def design(quick: bool) -> list[Case]:
    """Random (seeded) draws across the factors; the quick design uses other seeds (it
    was the pilot on which the thresholds were set), so the full numbers are out of sample."""
    base = 0 if quick else 100_000
    rng = np.random.default_rng(base + 17)
    n_runs = 120 if quick else 900
    cases: list[Case] = []
    for i in range(n_runs):
        tr = TRS[i % len(TRS)]
        volumes = int(rng.choice(LENGTHS, p=(0.25, 0.5, 0.25)))
        n, mb = LAYOUTS[tr][int(rng.integers(len(LAYOUTS[tr])))]
        snr = str(rng.choice(list(NOISE)))
        physio = str(rng.choice(list(PHYSIO)))
        low, high = PHYSIO[physio]
        order = ORDERS[int(rng.integers(len(ORDERS)))]
        applicable = [m for m in MISTAKES if wrong_claim(n, tr, order, mb, m) is not None]
        mistake = applicable[int(rng.integers(len(applicable)))]
        cases.append(Case(tr, n, mb, volumes, snr, physio, float(rng.uniform(low, high)),
                          float(rng.uniform(low, high)), order, mistake, base + i))
    for signal in ("noise", "voxelwise", "physio-only", *STRESS):
        extra = (8 if quick else 40) if signal in ("noise", "voxelwise", "physio-only",
                                                    "flipped") else (8 if quick else 24)
        for i in range(extra):
            tr = TRS[i % len(TRS)]
            n, mb = LAYOUTS[tr][i % len(LAYOUTS[tr])]
            order = ORDERS[i % len(ORDERS)]
            applicable = [m for m in MISTAKES if wrong_claim(n, tr, order, mb, m) is not None]
            amp = (0.5, 1.0) if signal == "physio-only" or signal in STRESS else (0.0, 0.0)
            cases.append(Case(tr, n, mb, 300, "medium", "high", amp[i % 2], amp[i % 2],
                              order, applicable[i % len(applicable)],
                              base + _stress_seed(signal) + i, signal))
    return cases


# --------------------------------------------------------------------------- summary


def _outcome(saved: dict[str, object]) -> Outcome:
    fields = {f: saved[f] for f in Case.__dataclass_fields__}
    case = Case(**fields)  # type: ignore[arg-type]
    return Outcome(case, str(saved["claim"]), str(saved["verdict"]),
                   saved["rival"], bool(saved["rival_is_truth"]),  # type: ignore[arg-type]
                   saved["effect"], saved["z_rival"],  # type: ignore[arg-type]
                   float(saved["p_evidence"]), float(saved["seconds"]),  # type: ignore[arg-type]
                   saved.get("z_signs"))  # type: ignore[arg-type]


def _rate(outcomes: Iterable[Outcome], verdict: str) -> tuple[int, int]:
    items = list(outcomes)
    return sum(o.verdict == verdict for o in items), len(items)


def _pct(pair: Sequence[int]) -> str:
    hit, total = pair
    return f"{100.0 * hit / total:.0f} % ({hit}/{total})" if total else "–"


def upper_95(hits: int, total: int) -> float:
    """One-sided 95 % upper bound of a rate (exact binomial; ``1 - 0.05 ** (1 / n)``
    when nothing was seen: the "rule of three" is its approximation 3 / n)."""
    if total == 0:
        return 1.0
    if hits == 0:
        return 1.0 - 0.05 ** (1.0 / total)
    from scipy import stats

    return float(stats.beta.ppf(0.95, hits + 1, total - hits))


VERDICTS = ("supported", "consistent", "contradicted", "undecidable")


def summarise(outcomes: Sequence[Outcome]) -> dict[str, object]:
    brain = [o for o in outcomes if o.case.signal == "brain"]
    true_claims = [o for o in brain if o.claim == "true"]
    wrong = [o for o in brain if o.claim != "true"]

    def row(items: Sequence[Outcome]) -> dict[str, int]:
        counts = Counter(o.verdict for o in items)
        return {v: counts.get(v, 0) for v in VERDICTS}

    def by(key: str, values: Iterable[object], items_true: Sequence[Outcome],
           items_wrong: Sequence[Outcome]) -> dict[str, dict[str, tuple[int, int]]]:
        out = {}
        for value in values:
            t = [o for o in items_true if getattr(o.case, key) == value]
            w = [o for o in items_wrong if getattr(o.case, key) == value]
            if t or w:
                out[str(value)] = {
                    "wrong_contradicted": _rate(w, "contradicted"),
                    "wrong_supported": _rate(w, "supported"),
                    "true_contradicted": _rate(t, "contradicted"),
                    "true_supported": _rate(t, "supported"),
                    "true_consistent": _rate(t, "consistent"),
                }
        return out

    t300 = [o for o in true_claims if o.case.volumes == 300]
    w300 = [o for o in wrong if o.case.volumes == 300]
    by_tr_length = {}
    for tr in TRS:
        for length in LENGTHS:
            t = [o for o in true_claims if o.case.tr == tr and o.case.volumes == length]
            w = [o for o in wrong if o.case.tr == tr and o.case.volumes == length]
            by_tr_length[f"{tr:g} s, {length} volumes"] = {
                "wrong_contradicted": _rate(w, "contradicted"),
                "true_supported": _rate(t, "supported"),
                "true_contradicted": _rate(t, "contradicted")}
    by_mistake = {m: {"contradicted": _rate([o for o in wrong if o.claim == m],
                                            "contradicted"),
                      "supported": _rate([o for o in wrong if o.claim == m], "supported")}
                  for m in MISTAKES}
    named = sum(1 for o in wrong if o.verdict == "contradicted" and o.rival_is_truth)
    # every run counts, the stress tests (physiology whose sign or delay varies along the
    # slice axis, weak neural signal) included; they are also reported on their own
    false_acc = [o for o in outcomes if o.claim == "true" and o.verdict == "contradicted"]
    all_true = [o for o in outcomes if o.claim == "true"]
    extras = {s: {"true": row([o for o in outcomes if o.case.signal == s and o.claim == "true"]),
                  "wrong": row([o for o in outcomes if o.case.signal == s and o.claim != "true"])}
              for s in ("noise", "voxelwise", "physio-only", *STRESS)}
    return {
        "confusion": {"true claim": row(true_claims), "wrong claim": row(wrong)},
        "false_accusations": [len(false_acc), len(all_true)],
        "false_accusation_upper_95": round(upper_95(len(false_acc), len(all_true)), 4),
        "false_accusation_cases": [asdict(o.case) for o in false_acc],
        "targets_300": by("tr", TRS, t300, w300),
        "by_tr_length": by_tr_length,
        "by_snr_300": by("snr", tuple(NOISE), t300, w300),
        "by_physio_300": by("physio", tuple(PHYSIO), t300, w300),
        "by_length": by("volumes", LENGTHS, true_claims, wrong),
        "by_mistake": by_mistake,
        "by_multiband": by("multiband", sorted({o.case.multiband for o in brain}),
                           true_claims, wrong),
        "wrong_supported_cases": sorted(
            f"TR {o.case.tr:g} s, {o.case.n_slices} slices, multiband {o.case.multiband}, "
            f"{o.case.volumes} volumes, {o.case.order}: {o.claim}" for o in wrong
            if o.verdict == "supported"),
        "contradicted_naming_truth": [named, _rate(wrong, "contradicted")[0]],
        "extras": extras,
        "seconds_per_verify": round(float(np.median([o.seconds for o in outcomes])), 3),
        "runs": len({o.case for o in outcomes}),
        "verifications": len(outcomes),
        "thresholds": {"shuffled_sets": ev.N_SETS, "z_contradict": ev.Z_CONTRADICT,
                       "min_effect": ev.MIN_EFFECT, "z_region": ev.Z_REGION,
                       "z_support": ev.Z_SUPPORT, "z_tie": ev.Z_TIE,
                       "tie_effect": ev.TIE_EFFECT, "max_true_hz": ev.MAX_TRUE_HZ,
                       "z_sign": ev.Z_SIGN},
    }


def power_table(outcomes: Sequence[Outcome]) -> dict[str, dict[str, float]]:
    """Detection of wrong claims against the z the rival reaches: for 300-volume runs by
    TR, the median bootstrap z of (rival - wrong claim) under the ordinary score and under
    the sign-invariant one, the share reaching each threshold, and the share the sign
    check turned from a contradiction into "undecidable" (the price of the veto)."""
    out: dict[str, dict[str, float]] = {}
    for tr in TRS:
        items = [o for o in outcomes if o.case.signal == "brain" and o.claim != "true"
                 and o.case.tr == tr and o.case.volumes == 300 and o.z_rival is not None]
        if not items:
            continue
        z = np.asarray([o.z_rival for o in items], dtype=float)
        zs = np.asarray([np.nan if o.z_signs is None else o.z_signs for o in items],
                        dtype=float)
        vetoed = [o for o in items if o.verdict == "undecidable" and o.z_rival is not None
                  and o.z_rival >= ev.Z_CONTRADICT and o.effect is not None
                  and o.effect >= ev.MIN_EFFECT and o.z_signs is not None
                  and o.z_signs < ev.Z_SIGN]
        out[f"{tr:g}"] = {"median_z": round(float(np.median(z)), 2),
                          "share_z_at_least_3": round(float(np.mean(z >= ev.Z_CONTRADICT)), 3),
                          "median_z_signs": round(float(np.nanmedian(zs)), 2)
                          if np.isfinite(zs).any() else float("nan"),
                          "share_z_signs": round(float(np.mean(zs >= ev.Z_SIGN)), 3),
                          "vetoed": round(len(vetoed) / len(items), 3)}
    return out


# --------------------------------------------------------------------------- figures


def figures(summary: dict[str, object], out: Path) -> list[str]:
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:  # pragma: no cover - optional
        return []
    folder = out / "figures"
    folder.mkdir(parents=True, exist_ok=True)
    names = []
    table = summary["by_tr_length"]
    assert isinstance(table, dict)
    fig, ax = plt.subplots(figsize=(6.4, 3.4))
    width = 0.25
    for j, length in enumerate(LENGTHS):
        rates = []
        for tr in TRS:
            hit, total = table[f"{tr:g} s, {length} volumes"]["wrong_contradicted"]
            rates.append(100.0 * hit / total if total else float("nan"))
        ax.bar(np.arange(len(TRS)) + (j - 1) * width, rates, width, label=f"{length} volumes")
    ax.axhline(80, color="0.4", lw=0.8, ls="--")
    ax.axhline(50, color="0.6", lw=0.8, ls=":")
    ax.set_xticks(np.arange(len(TRS)), [f"TR {tr:g} s" for tr in TRS])
    ax.set_ylabel("wrong claims contradicted (%)")
    ax.set_ylim(0, 100)
    ax.legend(frameon=False, fontsize=8)
    fig.tight_layout()
    fig.savefig(folder / "verify-detection.svg")
    plt.close(fig)
    names.append("figures/verify-detection.svg")
    physio = summary["by_physio_300"]
    assert isinstance(physio, dict)
    fig, ax = plt.subplots(figsize=(6.4, 3.0))
    keys = list(physio)
    for j, (field, label) in enumerate((("wrong_contradicted", "wrong claim: contradicted"),
                                        ("true_supported", "true claim: supported"),
                                        ("true_contradicted", "true claim: contradicted"))):
        rates = [100.0 * physio[k][field][0] / max(physio[k][field][1], 1) for k in keys]
        ax.bar(np.arange(len(keys)) + (j - 1) * width, rates, width, label=label)
    ax.set_xticks(np.arange(len(keys)),
                  [f"{k}\n({PHYSIO[k][0]:g}-{PHYSIO[k][1]:g} %)" for k in keys])
    ax.set_xlabel("respiration and cardiac amplitude (of baseline)")
    ax.set_ylabel("% of 300-volume runs")
    ax.set_ylim(0, 100)
    ax.legend(frameon=False, fontsize=8)
    fig.tight_layout()
    fig.savefig(folder / "verify-physiology.svg")
    plt.close(fig)
    names.append("figures/verify-physiology.svg")
    return names


# --------------------------------------------------------------------------- report


METHOD = """\
## Method

1. **Reduce** the run in one streaming pass (batches of 16 volumes): an in-brain mask from
   the first batch's mean (voxels above 0.2 × the 98th percentile), then, per volume, the
   mean of each quarter of each slice (4 channels per slice; two quarters on each side of
   the image make its two *halves*).
2. **Prepare** each channel course: take out abrupt level steps (least squares on step
   functions at every transition where the slices jump together far more than usual and
   than two volumes before and after, and at its neighbours), drop cosine terms below
   0.01 Hz (mean, drifts), scale to unit variance, **taper both ends** (a Hann window)
   and take its discrete Fourier transform; per slice and half, sum the channels' spectra.
   See "The ends of the run" below.
3. **Candidates**: the claim; sequential and interleaved (steps 2 and 3, every start,
   both directions) orders for every multiband factor ≤ 6 that divides the slice count,
   over the claim's acquisition window; the claim flipped along the slice axis and
   reversed in time when these are not among them; no offsets; identical time lists
   scored once (about 40-90). Every candidate is named by its scheme label, the words
   `slicetime show` prints (`schemes.infer`): an order to adopt, never an operation on
   the claim.
4. **Align, allowing for aliasing.** A component whose true frequency is *g* reaches
   slice *z* with phase 2π *g* *t*<sub>z</sub>. Sampled every TR it appears at the bin
   *f* = |*g* − *k*/TR| (sampling theorem), but its slice-to-slice phases keep the true
   *g*. At every bin *f* each candidate is therefore tried with every *g* = *f* + *k*/TR
   up to {max_hz} Hz (respiration, its harmonic and the heart), and the one that aligns the
   slices best is kept. The choice of *k* is made on one half of the image and the power
   counted on the other half (and across the halves), so that choosing cannot favour any
   schedule on noise: with independent halves, pure noise scores the same, on average,
   for every schedule.
5. **Weigh every bin by its coherence, not its power.** Each bin contributes the share
   of its power that the schedule aligns: its coherent power divided by the larger of
   the channels' power at that bin and the running median of that power over 9 bins.
   A periodic component — respiration, cardiac pulsation, aliased anywhere — or the
   strong slow bins therefore cannot carry a verdict alone: the evidence has to be
   spread over the spectrum. The score of a candidate is the mean pairwise coherence of
   the aligned channels over the bins.
6. **Calibrate.** *Timing evidence*: {sets} sets of as many orders as there are
   candidates, made by shuffling the claimed times across slices and scored the same
   way; the best candidate must beat the best order of every set (permutation p of
   1/{sets_plus}). *Differences*: a moving-block bootstrap over frequency bins (blocks of
   0.01 Hz, at least 3 bins; the same blocks for every candidate) gives a z for the
   difference between any alternative and the claim, overall and in each half of the
   image separately.
7. **Let every slice carry its own sign.** A second, *sign-invariant* score lets each
   channel (a slice in one half of the image) carry a free real gain — a sign and a
   size — for the shared component at each bin. With *y* the channel spectra aligned by
   a schedule, the best such fit explains (Σ|*y*<sub>c</sub>|² + |Σ *y*<sub>c</sub>²|) / 2 of the
   power (the top eigenvalue of Re(*y y*<sup>H</sup>)): squaring removes a sign (a phase of π)
   but not a delay. Σ *y*<sub>c</sub>² is the same delay-and-sum applied to the squared spectra
   at twice the true frequency, so it is scored by the same code (alias orders, the
   choice on one half and the count on the other, coherence weights, bootstrap).
8. **Verdict** (computed twice, once with each score as the primary one and the other as
   the second opinion, then combined: a contradiction by either — the sign-invariant one
   first, which needs no agreement from the ordinary score — else support or
   "consistent" by either unless the other has an alternative leading with z ≥
   {z_sign:g}). Under the ordinary score: *undecidable* without timing evidence.
   *contradicted* when one of the three best-scoring materially different alternatives
   beats the claim with z ≥ {z_contradict:g} over the bins, an effect ≥ {min_effect:g}
   (its lead over the claim as a share of the best candidate's lead over shuffled
   orders), z ≥ {z_region:g} in each half of the image on its own, **and** z ≥
   {z_sign:g} under the sign-invariant score; when the halves disagree, or the lead
   disappears once each slice may carry its own sign, the verdict is *undecidable*. With
   the sign-invariant score as the primary one the same thresholds apply to its own z,
   effect and halves, and its null is made of shuffled orders scored the same way.
   *supported* when the claim beats the best of every shuffled set **and** each of the
   three best alternatives with z ≤ −{z_support:g}, both halves agreeing (the claim
   beats the alternatives, not merely "no worse"). *consistent* (new, weaker) when the
   claim beats shuffled orders and no alternative beats it, but one fits about as well
   (z below {z_tie:g} or an effect below {tie_effect:g}): the data fit the claim without
   singling it out. Neither *supported* nor *consistent* when an alternative beats the
   claim with z ≥ {z_sign:g} under the sign-invariant score. *undecidable* otherwise.
   Units are not decided by verify: the times and the TR are read in seconds as the
   run's one resolved timing (`RunRecord.timing`, `schemes.resolve`) gives them (the
   audit reports the units).
9. **Name the order.** A contradiction names the better order by its scheme label and
   puts its slice times in the finding's evidence (`best_slice_times`, the sidecar's
   order, seconds; `best_order`, `claimed_order`). When it is *no offsets*, the message
   says that the data look already slice-time corrected. Alternatives within 8 % of the
   acquisition window (RMS, after the best common offset) of the claim are said to be too
   close in time to tell apart; a constant offset of every slice time cannot be seen.

## The ends of the run (issue 24)

A delay is a linear phase ramp on the discrete Fourier transform only for a periodic
sequence: on a finite run the ramp shifts the course *circularly* (the shift theorem of
the DFT, any signal-processing text). A run's shared course is rarely periodic — a drift,
a slow wander that ends elsewhere than it began, a block design cut mid-block — so its
periodic extension jumps at the run's ends, and the jump leaks over the whole spectrum
(Harris 1978, Proc. IEEE 66:51-83) at the same sample in every slice, that is with no
offsets. Aligning by any schedule with offsets misaligns that leak; "no offsets" escapes
the penalty. Checked on the second simulator (below): a slow random wander (Gaussian
smoothing of 10 s, a few tenths of a percent) made 3 of 4 true interleaved claims
*contradicted* (z 5.6-7.7), always in favour of no offsets; tapering both ends of every
course with a Hann window removed all of them, and no offsets stopped being the
alternative. Forcing the simulated course to end at its starting level did not help on
its own, because the cosine high-pass before the transform again leaves ends that
differ; the taper acts after it. Every candidate is scored on the same tapered spectra.

A level step that starts mid-volume is a second, different case: a step is not
band-limited, so sampled every TR it aliases whole over the spectrum (sampling
theorem), and the slices acquired before it see it one volume later, whole, not delayed
by their acquisition times. No schedule aligns that, while no offsets nearly does (1 of
the regression runs was still *contradicted* after the taper). Steps are therefore taken
out of every channel alike before scoring. Block and event designs (Glover 1999,
NeuroImage 9:416-429, response) rise smoothly and are not taken for steps.

## Why this evidence

The previous version aligned the slices with a phase ramp set by the frequency at which a
component *appears*. That is right for slow neural signal, which is sampled well above
its Nyquist rate, and wrong for respiration and cardiac pulsation above 1/(2 TR): their
slice phases follow their true frequency, so after folding they can run backwards (a
respiration at 0.3 Hz seen at 0.1 Hz with TR 2.5 s behaves as if the slices were
acquired in the reverse order, three times over). Real runs at TR ≥ 2 s nearly always
carry such signal; on held-out runs with a small respiration it contradicted 4 of 6 true
claims, always in favour of the reversed or flipped order.

Three remedies were possible: remove narrow-band peaks before scoring; score only
frequencies where the timing is interpretable; or model the unknown true frequency and
require agreement across frequencies and regions. Removing peaks alone does not work
because respiration and heart rates wander: at TR 2.5 s a respiration between 0.22 and
0.32 Hz folds onto 0.08-0.18 Hz, most of the spectrum, and the wandering heart rate
folds over all of it. Scoring only low frequencies does not work either, because the
folded bands land anywhere, including near 0 Hz (a heart at exactly 1/TR). Modelling the
true frequency turns physiology from a source of false accusations into evidence for the
true schedule, which is also what raises detection at TR 0.8 s (cardiac pulsation spans
almost a full cycle across the slices). The price of modelling — a wrong schedule may
fit some bins with some other *k* — is paid by choosing *k* on one half of the image
and scoring it on the other, by weighing bins by coherence so that no single band can
decide, and by asking both halves of the image to agree before accusing a claim.

## Physiology whose sign varies across the brain

Physiological intensity changes vary in sign across the brain (near vessels and edges a
field shift brightens one side and darkens the other). When respiration has opposite
signs in the lower and upper slices, the true schedule aligns the two groups and their
signs cancel in the delay-and-sum; a wrong schedule cancels less and can score higher.
The version before this one contradicted 29 of 40 true claims in that stress test (weak
neural signal, respiration 0.5-1 %).

Two remedies were considered. *Regions made of slabs of slices* (a contradiction must
hold in the lower and in the upper slices separately) fixes exactly that case, but any
fixed partition is defeated by a sign that changes every few slices or at random, and
slabs of a few slices lose the timing differences that separate sequential orders. A
*sign-invariant score* covers every pattern at once: for a component with real gains
*g*<sub>c</sub> of any signs and no extra delay per channel, the true schedule makes the aligned
vector real up to one common phase, so its sign-invariant coherence at that bin is 1, the
most any schedule can reach; and since squaring circularly symmetric noise leaves it
circularly symmetric, noise scores the same on average for every schedule (choosing the
alias order on one half and counting on the other, as before). One gain per channel and
bin was chosen over one sign pattern per source shared by all bins: sources overlap at
the same bins after aliasing (neural signal positive nearly everywhere, respiration and
cardiac pulsation with their own patterns), and a shared pattern would have to be
estimated from the data, which could favour a schedule.

Why a second score that must agree, not a replacement: the sign-invariant score is
weaker. It is fourth-order in the data (each channel's own squared spectrum: when a
bin's signal is small beside its noise, the noise × noise term dominates), and it knows a
channel's timing only modulo half a cycle of the true frequency: 0.5 s for a heart at
1 Hz, 0.4 s at 1.25 Hz, 1.7 s for respiration at 0.3 Hz (0.8 s for its harmonic);
slice-time differences of that size (up to the acquisition window) weigh less or not at
all in those bins, while slow neural components (half a cycle longer than the window)
lose nothing to it. The power table below measures the loss (median z under both
scores). Used as a condition for "contradicted",
it can only turn a contradiction into *undecidable*, never create one: false accusations
can only go down, and a wrong claim is lost only when the sign-invariant score cannot
confirm the ordinary one (the last column of the power table).

Measured in this study: across the five stress tests (136 runs with weak neural signal
and physiology of varying sign or delay), the ordinary score alone would have
contradicted 86 true claims (z ≥ 3, effect ≥ 0.1); under the sign-invariant score the
same alternatives trailed the true claim every time (z from −7.2 to −1.9), so none was
contradicted. Among the 900 ordinary runs the check cost 4 detections (wrong claims with
an ordinary z of 3.1-5.0 and a sign-invariant z of 1.2-1.9, three of them 150-volume
runs at TR 2.5 s). In the stress tests most wrong claims are left *undecidable* (45 of
136 contradicted): with neural signal at 0.1 %, the shared signal is mostly physiology
whose signs the sign-invariant score ignores along with its half-cycle timing, and an
honest "cannot tell" is the right answer there.

What it still cannot protect against: anything that *delays* the signal differently from
slice to slice (regional latency, a travelling wave, slice-wise motion) is read as
timing, by both scores; the stress test with delays growing by 0.3 s along the slice
axis measures one such case. A constant offset of every slice is invisible. Calibration
is on simulated data; real runs have more voxels per slice and less shared signal per
voxel, so these are the method's rates on these simulations, not guarantees.

Speed and memory: about 1.0 s and 190 MiB peak per 64 × 64 × 40 × 300 int16 `.nii.gz`
run (`benchmarks/bench_verify.py`: median of 3-5 fresh processes; the version before the
physiology work took 0.76 s in the same command). The sign-invariant score adds about
10 ms to 0.45 s of scoring (49 candidates, 40 slices); against the version without it,
in the same command, the ratio was 0.76-1.14 over three runs on the shared machine
(measurement noise larger than the difference). The shuffled-order null is the main
cost: as many orders as candidates in each of {sets} sets, each scored at every alias
order, done as one single-precision matrix product.
"""



def _table(title: str, rows: dict[str, dict[str, tuple[int, int]]], fields: Sequence[str],
           labels: Sequence[str]) -> list[str]:
    lines = ["", title, "", "| | " + " | ".join(labels) + " |",
             "|---|" + "---:|" * len(labels)]
    for name, r in rows.items():
        lines.append(f"| {name} | " + " | ".join(_pct(r[f]) for f in fields) + " |")
    return lines


def write_markdown(summary: dict[str, object], power: dict[str, dict[str, float]],
                   figs: Sequence[str], path: Path, quick: bool, seconds: float) -> None:
    s = summary
    conf = s["confusion"]
    assert isinstance(conf, dict)
    fa, n_true = s["false_accusations"]  # type: ignore[misc]
    lines = [
        "# Verify: does a run's own data support its claimed slice order?",
        "",
        "Generated by `validation/verify_study.py`"
        + (" (reduced design: `--quick`)" if quick else "")
        + f" in {seconds / 60:.0f} min; {s['runs']} simulated runs, {s['verifications']} "
        f"verifications; median {s['seconds_per_verify']} s per verification "
        f"({INPLANE} × {INPLANE} × slices × volumes, in memory). "
        + ("The thresholds were set on this reduced design in an earlier release; the "
           "changes of issue 24 (tapered ends, steps, the two scores combined) were chosen "
           "on seeds 0-2 of the second simulator, not on this design." if quick else
           "Thresholds were set on the reduced design (`--quick`, other seeds) before this "
           "run."),
        "",
        METHOD.format(max_hz=ev.MAX_TRUE_HZ, sets=ev.N_SETS, sets_plus=ev.N_SETS + 1,
                      z_contradict=ev.Z_CONTRADICT, min_effect=ev.MIN_EFFECT,
                      z_region=ev.Z_REGION, z_support=ev.Z_SUPPORT, z_tie=ev.Z_TIE,
                      tie_effect=ev.TIE_EFFECT, z_sign=ev.Z_SIGN),
        "## Simulated runs",
        "",
        f"`BrainRun` (`slicetime/pipelines/simulate.py`), {INPLANE} × {INPLANE} voxels per "
        "slice with an elliptical brain; in % of the baseline: task response peak 0.5 "
        "(events convolved with the canonical double-gamma response, regional latency "
        "differences sd 0.3 s), three slow network fluctuations (0.01-0.1 Hz, sd 0.4, "
        "regional maps), a global fluctuation (sd 0.2), drift, motion-like events (about 1 "
        "per 100 volumes, steps of sd 1 % decaying over 4 s, sampled at each slice's own "
        "time), respiration (mean rate 0.2-0.35 Hz wandering by 8 %, a harmonic, depth "
        "changes; broad map plus an edge term of both signs) and cardiac pulsation (mean "
        "rate 0.9-1.3 Hz wandering by 5 %, two harmonics; patchy map, regional delays up "
        "to about 0.2 s), AR(1) noise (lag-one 0.3). Amplitudes of respiration and cardiac "
        "pulsation: " + ", ".join(f"{k} {v[0]:g}-{v[1]:g}" for k, v in PHYSIO.items())
        + "; voxel noise " + ", ".join(f"{k} SNR {v:g} (tSNR {100 / v:.0f})"
                                       for k, v in NOISE.items())
        + ". TR " + ", ".join(f"{t:g}" for t in TRS) + " s with slice counts and multiband "
        "factors typical of each (" + "; ".join(
            f"{tr:g} s: " + ", ".join(f"{n}/×{m}" for n, m in LAYOUTS[tr]) for tr in TRS)
        + "); 150, 300 or 600 volumes (half the runs 300); true orders "
        + ", ".join(ORDERS) + ". Each run is verified against its true schedule and against "
        "one wrong claim: " + ", ".join(MISTAKES) + ".",
        "",
        "## False accusations",
        "",
        f"- true claims contradicted: **{fa} of {n_true}** (every run, including the "
        "runs without neural signal below); one-sided 95 % upper bound of the rate: "
        f"{100 * float(s['false_accusation_upper_95']):.2f} %.",  # type: ignore[arg-type]
        "",
        "## Confusion matrix (runs with neural signal and physiology)",
        "",
        "| claim | " + " | ".join(VERDICTS) + " |",
        "|---|" + "---:|" * len(VERDICTS),
    ]
    for name, row in conf.items():
        lines.append(f"| {name} | " + " | ".join(str(row[v]) for v in VERDICTS) + " |")
    fields = ("wrong_contradicted", "wrong_supported", "true_supported", "true_consistent",
              "true_contradicted")
    labels = ("wrong: contradicted", "wrong: supported", "true: supported",
              "true: consistent", "true: contradicted")
    targets = s["targets_300"]
    assert isinstance(targets, dict)
    lines += _table("## The targets: 300-volume runs by TR (every SNR and physiology level)",
                    targets, fields, labels)
    lines += ["", "Targets: wrong claims contradicted in at least 80 % at TR 1.5-2.5 s and "
              "50 % at TR 0.8 s; no true claim contradicted."]
    for fig in figs:
        lines += ["", f"![{Path(fig).stem}]({fig})"]
    table = s["by_tr_length"]
    assert isinstance(table, dict)
    lines += _table("## By TR and run length", table,
                    ("wrong_contradicted", "true_supported", "true_contradicted"),
                    ("wrong: contradicted", "true: supported", "true: contradicted"))
    for title, key in (("## By SNR (300 volumes)", "by_snr_300"),
                       ("## By physiology amplitude (300 volumes)", "by_physio_300"),
                       ("## By run length (every TR)", "by_length"),
                       ("## By true multiband factor", "by_multiband")):
        rows = s[key]
        assert isinstance(rows, dict)
        lines += _table(title, rows, fields, labels)
    by_m = s["by_mistake"]
    assert isinstance(by_m, dict)
    lines += _table("## By kind of mistake (every TR and length)", by_m,
                    ("contradicted", "supported"), ("contradicted", "supported"))
    named, total = s["contradicted_naming_truth"]  # type: ignore[misc]
    lines += ["", f"Of the contradicted wrong claims, {named} of {total} name the true "
              "schedule as the better alternative; the others name a schedule close to it in "
              "time (e.g. the same order under another multiband factor)."]
    cases = s["wrong_supported_cases"]
    assert isinstance(cases, list)
    if cases:
        lines += ["", "Wrong claims reported as supported:", ""] + [f"- {c}" for c in cases]
    extras = s["extras"]
    assert isinstance(extras, dict)
    names = {"noise": "pure noise (no shared signal)",
             "voxelwise": "strong voxel-wise fluctuations (AR(1) 0.9, no shared signal)",
             "physio-only": "physiology only (respiration and cardiac 0.5-1 %, no neural "
                            "signal)",
             "flipped": "stress test: respiration 0.5-1 % of opposite sign in the lower and "
                        "upper slices, weak neural signal",
             "alternating": "stress test: respiration and cardiac 0.5-1 %, sign flipping "
                            "every 4 slices, weak neural signal",
             "gradient": "stress test: respiration 0.5-1 % with a smooth sign gradient "
                         "along the slices (+1 to -1), cardiac of opposite sign in the "
                         "lower and upper slices, weak neural signal",
             "random-signs": "stress test: respiration and cardiac 0.5-1 % with a random "
                             "sign in every slice, weak neural signal",
             "delays": "stress test: respiration (opposite signs by halves) and cardiac "
                       "(signs +, -, + by thirds) 0.5-1 %, both delayed by 0 to 0.3 s "
                       "along the slice axis, weak neural signal"}
    lines += ["", "## Runs without neural signal, and stress tests (300 volumes, TR 0.8-2.5 s)",
              "",
              "| data | claim | " + " | ".join(VERDICTS) + " |",
              "|---|---|" + "---:|" * len(VERDICTS)]
    for key, rows in extras.items():
        for claim in ("true", "wrong"):
            r = rows[claim]
            lines.append(f"| {names[key]} | {claim} | "
                         + " | ".join(str(r[v]) for v in VERDICTS) + " |")
    lines += ["", "## Power", "",
              "Wrong claims, 300 volumes: median bootstrap z of the reported alternative "
              "over the claim under the ordinary score and under the sign-invariant score, "
              f"the share reaching each threshold (z ≥ {ev.Z_CONTRADICT:g} and z ≥ "
              f"{ev.Z_SIGN:g}), and the share that the ordinary score alone would have "
              "contradicted but the sign check left undecidable (the price of the check):",
              "", "| TR (s) | median z | share z ≥ 3 | median sign-invariant z | "
              f"share ≥ {ev.Z_SIGN:g} | left undecidable by the sign check |",
              "|---|---:|---:|---:|---:|---:|"]
    for tr, r in power.items():
        lines.append(f"| {tr} | {r['median_z']} | {100 * r['share_z_at_least_3']:.0f} % | "
                     f"{r.get('median_z_signs', float('nan'))} | "
                     f"{100 * r.get('share_z_signs', float('nan')):.0f} % | "
                     f"{100 * r.get('vetoed', float('nan')):.0f} % |")
    lines.append("")
    text = "\n".join(lines)
    # keep the second simulator's section (validation/verify_heldout.py writes it)
    try:
        from validation.verify_heldout import BEGIN, END
    except ImportError:  # run as a script: this folder is on the path
        from verify_heldout import BEGIN, END  # type: ignore[import-not-found,no-redef]

    old = path.read_text(encoding="utf-8") if path.exists() else ""
    if BEGIN in old and END in old:
        kept = BEGIN + old.split(BEGIN, 1)[1].split(END, 1)[0] + END + "\n"
        text = text.rstrip("\n") + "\n\n" + kept
    path.write_text(text, encoding="utf-8")


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=Path("docs"))
    parser.add_argument("--quick", action="store_true", help="a reduced design")
    parser.add_argument("--jobs", type=int, default=2, help="processes (at most 2)")
    parser.add_argument("--report-only", action="store_true",
                        help="rewrite the report and figures from the saved JSON")
    args = parser.parse_args(argv)
    name = "verify-quick" if args.quick else "verify"
    if args.report_only:
        saved = json.loads((args.out / f"{name}.json").read_text(encoding="utf-8"))
        results = [_outcome(r) for r in saved["runs"]]
        summary = summarise(results)
        figs = [] if args.quick else figures(summary, args.out)
        write_markdown(summary, power_table(results), figs, args.out / f"{name}.md",
                       args.quick, float(saved.get("seconds", 0.0)))
        return 0
    cases = design(args.quick)
    start = time.perf_counter()
    results: list[Outcome] = []
    with ProcessPoolExecutor(max_workers=min(2, max(1, args.jobs))) as pool:
        for i, items in enumerate(pool.map(run_case, cases, chunksize=2), start=1):
            results.extend(items)
            if i % 50 == 0:
                print(f"{i}/{len(cases)} runs, {time.perf_counter() - start:.0f} s",
                      file=sys.stderr, flush=True)
    seconds = time.perf_counter() - start
    summary = summarise(results)
    power = power_table(results)
    args.out.mkdir(parents=True, exist_ok=True)
    (args.out / f"{name}.json").write_text(json.dumps(
        {"summary": summary, "power": power, "seconds": round(seconds, 1),
         "runs": [dict(asdict(o.case), claim=o.claim, verdict=o.verdict, rival=o.rival,
                       effect=None if o.effect is None else round(o.effect, 4),
                       z_rival=None if o.z_rival is None or not math.isfinite(o.z_rival)
                       else round(o.z_rival, 3), p_evidence=round(o.p_evidence, 4),
                       z_signs=None if o.z_signs is None or not math.isfinite(o.z_signs)
                       else round(o.z_signs, 3),
                       rival_is_truth=o.rival_is_truth, seconds=round(o.seconds, 4))
                  for o in results]}, separators=(",", ":"), default=str) + "\n",
        encoding="utf-8")
    figs = [] if args.quick else figures(summary, args.out)
    write_markdown(summary, power, figs, args.out / f"{name}.md", args.quick, seconds)
    print(json.dumps(summary["confusion"]), json.dumps(summary["targets_300"]),
          f"{seconds:.0f} s", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

__all__ = ["Case", "Outcome", "design", "main", "run_case", "simulate_case", "summarise",
           "wrong_claim"]
