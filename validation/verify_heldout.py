"""verify on the second, independent simulator (:mod:`validation.heldout_sim`).

For each simulated run (a signal family, a true order, a TR, a number of volumes) verify
checks the true claim and one wrong claim. Seeds split the study: thresholds were set
on the tuning range (``--seeds 0:N``), and the reported numbers come from another range.

    python validation/verify_heldout.py --seeds 1000:1040 --out bench-results/heldout.json
"""

from __future__ import annotations

import argparse
import json
import sys
import time
import zlib
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from validation import heldout_sim as hs

#: (TR seconds, slices) pairs: single-band at the longer TRs, multiband-friendly counts
SETTINGS = ((0.8, 36), (1.5, 36), (2.0, 36), (2.5, 40))


@dataclass(frozen=True)
class Trial:
    family: str
    repetition_time: float
    volumes: int
    n_slices: int
    order: str
    multiband: int
    mistake: str | None  # None: the true claim
    seed: int
    verdict: str = ""
    named: str | None = None
    named_is_truth: bool | None = None
    seconds: float = 0.0
    z: float | None = None
    z_regions: tuple[float, float] | None = None
    effect: float | None = None
    p_evidence: float | None = None


def trials(seeds: range, families: Sequence[str], volumes: Sequence[int]) -> list[Trial]:
    out: list[Trial] = []
    for seed in seeds:
        for tr, n in SETTINGS:
            for family in families:
                for vols in volumes:
                    orders = hs.orders_for(n)
                    rng = np.random.default_rng([seed, int(tr * 10), vols, len(family)])
                    order, mb = orders[int(rng.integers(len(orders)))]
                    mistakes = [m for m in hs.MISTAKES
                                if hs.wrong_claim(n, tr, order, mb, m) is not None]
                    mistake = mistakes[int(rng.integers(len(mistakes)))]
                    for m in (None, mistake):
                        out.append(Trial(family, tr, vols, n, order, mb, m, seed))
    return out


def run_trial(trial: Trial) -> Trial:
    from slicetime.engines.verify import schedule_distance
    from slicetime.pipelines.verify import verify_array

    truth = hs.order_times(trial.n_slices, trial.repetition_time, trial.order, trial.multiband)
    claim = truth if trial.mistake is None else hs.wrong_claim(
        trial.n_slices, trial.repetition_time, trial.order, trial.multiband, trial.mistake)
    assert claim is not None
    seed = trial.seed * 7919 + int(trial.repetition_time * 100) + trial.volumes
    run = hs.simulate(trial.family, truth, trial.repetition_time, trial.volumes,
                      seed + zlib.crc32(trial.family.encode()) % 1000)
    start = time.perf_counter()
    decision = verify_array(run.data, claim, trial.repetition_time, seed=trial.seed)
    seconds = time.perf_counter() - start
    named = decision.rival_times if decision.verdict == "contradicted" else None
    is_truth = None
    if named is not None:
        is_truth = schedule_distance(named, truth) < 0.02 * trial.repetition_time
    return Trial(**{**asdict(trial), "verdict": decision.verdict,
                    "named": decision.rival_name if named is not None else None,
                    "named_is_truth": is_truth, "seconds": seconds,
                    "z": decision.z_rival, "z_regions": decision.z_regions,
                    "effect": decision.effect, "p_evidence": decision.p_evidence})


def upper_95(hits: int, total: int) -> float:
    """One-sided 95 % upper bound of a rate (Clopper-Pearson; for 0 hits 1 - 0.05^(1/n))."""
    from scipy.stats import beta

    if total == 0:
        return 1.0
    if hits >= total:
        return 1.0
    return float(beta.ppf(0.95, hits + 1, total - hits))


def summarise(done: Sequence[Trial]) -> dict[str, object]:
    true = [t for t in done if t.mistake is None]
    wrong = [t for t in done if t.mistake is not None]
    fa = sum(t.verdict == "contradicted" for t in true)

    def counts(group: Sequence[Trial]) -> dict[str, int]:
        out = {v: 0 for v in ("supported", "consistent", "contradicted", "undecidable")}
        for t in group:
            out[t.verdict] += 1
        return out

    def caught(key: str) -> dict[str, list[int]]:
        table: dict[str, list[int]] = {}
        for t in wrong:
            k = str(getattr(t, key))
            row = table.setdefault(k, [0, 0])
            row[0] += t.verdict == "contradicted"
            row[1] += 1
        return table

    realistic_true = [t for t in true if t.family in ("realistic", "block", "event")]
    named = [t for t in wrong if t.named is not None]
    return {
        "runs": len(done),
        "true_claims": counts(true),
        "true_contradicted": [fa, len(true), round(upper_95(fa, len(true)), 4)],
        "true_by_family": {f: counts([t for t in true if t.family == f])
                           for f in sorted({t.family for t in true})},
        "task_true_supported": [sum(t.verdict == "supported" for t in realistic_true),
                                len(realistic_true)],
        "wrong_claims": counts(wrong),
        "wrong_by_tr": caught("repetition_time"),
        "wrong_by_volumes": caught("volumes"),
        "wrong_by_mistake": caught("mistake"),
        "wrong_by_family": caught("family"),
        "wrong_realistic_by_tr": {
            str(tr): [sum(t.verdict == "contradicted" for t in wrong
                          if t.family == "realistic" and t.repetition_time == tr),
                      sum(1 for t in wrong if t.family == "realistic"
                          and t.repetition_time == tr)]
            for tr, _ in SETTINGS},
        "named_is_truth": [sum(bool(t.named_is_truth) for t in named), len(named)],
        "median_seconds": float(np.median([t.seconds for t in done])) if done else 0.0,
    }


BEGIN = "<!-- second simulator: written by validation/verify_heldout.py -->"
END = "<!-- end of the second simulator -->"


def _span(seeds: str) -> str:
    first, last = (int(x) for x in seeds.split(":"))
    return f"{first} to {last - 1}"


def _pct(pair: Sequence[int]) -> str:
    hits, total = pair
    return f"{100 * hits / total:.0f} % ({hits}/{total})" if total else "–"


def project_lines(before: dict[str, Any], after: dict[str, Any]) -> list[str]:
    """Before and after on the project's own simulator (``verify_study.py`` summaries)."""
    out = ["## Before and after on the project's simulator", "",
           "| engine | runs | true claims contradicted | wrong claims contradicted | "
           "order named = truth | true claims supported |", "|---|---:|---:|---:|---:|---:|"]
    for name, s in (("previous (full design)", before), ("this one (reduced design)", after)):
        conf = s["confusion"]
        wrong, true = conf["wrong claim"], conf["true claim"]
        n_wrong, n_true = sum(wrong.values()), sum(true.values())
        out.append(f"| {name} | {s['runs']} | {_pct(s['false_accusations'])} | "
                   f"{_pct([wrong['contradicted'], n_wrong])} | "
                   f"{_pct(s['contradicted_naming_truth'])} | "
                   f"{_pct([true['supported'], n_true])} |")
    out += ["", "(wrong and supported counts: the runs with neural signal and physiology; "
            "true claims contradicted: every run. The reduced design is 184 runs on seeds "
            "other than the full design's.)", ""]
    return out


def markdown(summary: dict[str, Any], seeds: str, before: dict[str, Any] | None,
             realistic: dict[str, Any] | None = None,
             project: tuple[dict[str, Any], dict[str, Any]] | None = None) -> str:
    """The second simulator's section of docs/verify.md."""
    s = summary
    lines = [BEGIN, ""] + (project_lines(*project) if project else []) + [
             "## The second simulator (held out)", "",
             "`validation/heldout_sim.py` was written apart from `pipelines/simulate.py` and "
             "from the engine (no shared code): every slice sampled at its own true time; "
             "24 × 24 voxels, 36 slices (40 at TR 2.5 s), 300 volumes, thermal noise 1 % "
             "per voxel; one signal family per run: slow wander (10 s smoothing), linear, "
             "quadratic and exponential drift, one sinusoid at 0.01-0.1 Hz, block and "
             "event designs cut anywhere (Glover 1999 response), aliased respiration and "
             "pulse of mixed sign, a step mid-volume, three networks with maps of both "
             "signs, and *realistic* (a task, networks, physiology and drift together). "
             "Each run is verified with its true claim and with one wrong claim (reversed, "
             "sequential for interleaved and back, the other parity, a wrong multiband "
             "factor). The decision rule was chosen on seeds 0-2; the numbers below are "
             f"from seeds {_span(seeds)}.", ""]
    fa, n_true, upper = s["true_contradicted"]
    lines += [f"- true claims contradicted: **{fa} of {n_true}**; one-sided 95 % upper "
              f"bound of the rate: {100 * upper:.1f} %.",
              f"- the order named when a wrong claim is contradicted is the true one: "
              f"{_pct(s['named_is_truth'])}.",
              f"- true claims with a task signal (block, event, realistic) supported: "
              f"{_pct(s['task_true_supported'])}.",
              ""]
    counts = s["true_claims"], s["wrong_claims"]
    lines += ["| claim | supported | consistent | contradicted | undecidable |",
              "|---|---:|---:|---:|---:|"]
    for name, row in zip(("true claim", "wrong claim"), counts, strict=True):
        assert isinstance(row, dict)
        lines.append(f"| {name} | {row['supported']} | {row['consistent']} | "
                     f"{row['contradicted']} | {row['undecidable']} |")
    lines += ["", "Wrong claims contradicted:", "",
              "| by | value | every family | realistic runs |", "|---|---|---:|---:|"]
    by_tr = s["wrong_by_tr"]
    real = s["wrong_realistic_by_tr"]
    assert isinstance(by_tr, dict) and isinstance(real, dict)
    for tr, pair in by_tr.items():
        lines.append(f"| TR | {tr} s | {_pct(pair)} | {_pct(real.get(tr, [0, 0]))} |")
    for key, label in (("wrong_by_volumes", "volumes"), ("wrong_by_mistake", "wrong claim"),
                       ("wrong_by_family", "signal family")):
        table = s[key]
        assert isinstance(table, dict)
        for value, pair in table.items():
            lines.append(f"| {label} | {value} | {_pct(pair)} | |")
    lines += ["", "A run whose only shared signal is one slow family (drifts, a slow wander, "
              "one sinusoid, a block design, a step) carries almost no timing information: "
              "such a course changes little within one TR, so schedules differ by little. "
              "Wrong claims there are left *undecidable* rather than accused, which is the "
              "honest answer; event designs, networks and realistic runs carry the "
              "evidence.", ""]
    lines += ["", "True claims by signal family (supported / consistent / contradicted / "
              "undecidable):", ""]
    fam = s["true_by_family"]
    assert isinstance(fam, dict)
    lines += ["| family | supported | consistent | contradicted | undecidable |",
              "|---|---:|---:|---:|---:|"]
    for name, row in fam.items():
        lines.append(f"| {name} | {row['supported']} | {row['consistent']} | "
                     f"{row['contradicted']} | {row['undecidable']} |")
    if realistic is not None:
        r = realistic["summary"]
        true_counts = r["true_claims"]
        lines += ["", f"Realistic runs only (a task, networks, physiology and drift; seeds "
                  f"{_span(realistic['seeds'])}):", "",
                  "| TR | wrong claims contradicted | named = truth |", "|---|---:|---:|"]
        trials = realistic["trials"]
        for tr, pair in r["wrong_by_tr"].items():
            named = [t for t in trials if t["mistake"] and str(t["repetition_time"]) == tr
                     and t["verdict"] == "contradicted"]
            lines.append(f"| {tr} s | {_pct(pair)} | "
                         f"{_pct([sum(bool(t['named_is_truth']) for t in named), len(named)])} |")
        mid = [r["wrong_by_tr"][k] for k in ("1.5", "2.0", "2.5") if k in r["wrong_by_tr"]]
        hits, total = sum(p[0] for p in mid), sum(p[1] for p in mid)
        fast = r["wrong_by_tr"].get("0.8", [0, 0])
        lines += ["", f"Against the aims of issue 24: wrong claims contradicted at TR 1.5-2.5 s "
                  f"{_pct([hits, total])} (aim at least 80 %); at TR 0.8 s {_pct(fast)} "
                  "(aim at least 60 %: not reached; the slice delays are under 0.8 s and "
                  "the shared signal is mostly slower than 0.1 Hz, so the wrong claims there "
                  "reach z 2.2-3.0 against the threshold of 3, and lowering it would let "
                  "slow-signal runs accuse true claims: on the tuning seeds, true claims "
                  "with networks or a block design reached z 2.8)."]
        n_true = sum(true_counts.values())
        lines += ["", f"True claims: {true_counts['supported']} supported, "
                  f"{true_counts['consistent']} consistent, {true_counts['contradicted']} "
                  f"contradicted, {true_counts['undecidable']} undecidable (of {n_true})."]
    if before is not None:
        b = before
        bfa, bn, bup = b["true_contradicted"]
        span = _span(str(b.get("seeds", "0:0")))
        lines += ["", "Before this change (the engine of the previous release, the same "
                  f"simulator, seeds {span}): true claims contradicted "
                  f"{bfa} of {bn} (one-sided 95 % upper bound {100 * bup:.1f} %); wrong "
                  f"claims contradicted {_pct([b['wrong_claims']['contradicted'], bn])}, "
                  "many of them only because no offsets won on the signal's shape; the "
                  f"order named was the true one in {_pct(b['named_is_truth'])}."]
    lines += ["", f"Median time per verification: {s['median_seconds']:.2f} s (24 × 24 × "
              "slices × 300, in memory, on the shared machine).", "", END, ""]
    return "\n".join(lines)


def insert_section(doc: Path, section: str) -> None:
    """Put ``section`` into ``doc`` in place of an earlier one (or at the end)."""
    text = doc.read_text(encoding="utf-8") if doc.exists() else ""
    if BEGIN in text and END in text:
        head, rest = text.split(BEGIN, 1)
        tail = rest.split(END, 1)[1].lstrip("\n")
        text = head + section + tail
    else:
        text = text.rstrip("\n") + "\n\n" + section
    doc.write_text(text, encoding="utf-8")


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--seeds", default="1000:1004", help="first:last (exclusive)")
    parser.add_argument("--families", default=",".join(hs.FAMILIES))
    parser.add_argument("--volumes", default="300")
    parser.add_argument("--out", type=Path, default=None)
    parser.add_argument("--doc", type=Path, default=None,
                        help="write the section into this markdown file (docs/verify.md)")
    parser.add_argument("--before", type=Path, default=None,
                        help="a saved JSON of the same study with the earlier engine")
    parser.add_argument("--realistic", type=Path, default=None,
                        help="a saved JSON of a realistic-only run, tabled by TR")
    parser.add_argument("--project", type=Path, nargs=2, default=None,
                        metavar=("BEFORE", "AFTER"),
                        help="verify_study.py JSON files of the previous and this engine")
    parser.add_argument("--report-only", action="store_true",
                        help="rewrite --doc from the saved --out JSON")
    args = parser.parse_args(argv)
    if args.report_only:
        saved = json.loads(args.out.read_text(encoding="utf-8"))
        before = None
        if args.before:
            old = json.loads(args.before.read_text(encoding="utf-8"))
            before = {**old["summary"], "seeds": old["seeds"]}
        realistic = None
        if args.realistic:
            realistic = json.loads(args.realistic.read_text(encoding="utf-8"))
        project = None
        if args.project:
            project = tuple(json.loads(p.read_text(encoding="utf-8"))["summary"]
                            for p in args.project)
        insert_section(args.doc, markdown(saved["summary"], saved["seeds"], before, realistic,
                                          project))  # type: ignore[arg-type]
        return 0
    first, last = (int(x) for x in args.seeds.split(":"))
    design = trials(range(first, last), args.families.split(","),
                    [int(v) for v in args.volumes.split(",")])
    done = []
    for i, trial in enumerate(design):
        done.append(run_trial(trial))
        if (i + 1) % 20 == 0:
            print(f"{i + 1}/{len(design)}", file=sys.stderr, flush=True)
    summary = summarise(done)
    text = json.dumps({"seeds": args.seeds, "summary": summary,
                       "trials": [asdict(t) for t in done]}, indent=1)
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(text)
    if args.doc:
        before = None
        if args.before:
            old = json.loads(args.before.read_text(encoding="utf-8"))
            before = {**old["summary"], "seeds": old["seeds"]}
        insert_section(args.doc, markdown(summary, args.seeds, before))
    print(json.dumps(summary, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
