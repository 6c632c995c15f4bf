"""Run the validation study and write docs/validation.md, its figures and its numbers.

    python validation/make_report.py [--out docs]      (or: make validate)

Everything is simulated and seeded, so the numbers are reproducible on any
machine; the run takes seconds on 2 cores.
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import time
from collections import defaultdict
from dataclasses import asdict
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import matplotlib
from matplotlib.backends.backend_svg import FigureCanvasSVG
from matplotlib.figure import Figure

from validation.study import (
    METHODS,
    AccuracyRow,
    GlmRow,
    accuracy,
    generated_protocols,
    glm_effect,
    inference,
)

TRS = (0.7, 1.0, 2.0, 3.0)
SLICES = (24, 40, 60)
SCHEMES = ("sequential", "interleaved", "multiband2", "multiband3")
GLM_TRS = (0.7, 1.0, 1.5, 2.0, 2.5, 3.0)
STYLE = {"fourier": "#1f5f8b", "sinc": "#6a9a3a", "cubic": "#b5651d", "linear": "#8c6bb1"}


matplotlib.rcParams["svg.hashsalt"] = "slicetime-validation"  # stable ids: stable diffs


def _save(fig: Figure, path: Path) -> None:
    FigureCanvasSVG(fig)
    fig.savefig(path, format="svg", metadata={"Date": None})


def accuracy_figure(rows: list[AccuracyRow], path: Path) -> None:
    fig = Figure(figsize=(7.5, 3.4))
    for k, part in enumerate(("interior", "edge")):
        ax = fig.add_subplot(1, 2, k + 1)
        for method in METHODS:
            medians = [statistics.median(getattr(r, part) for r in rows
                                         if r.method == method and r.tr == tr) for tr in TRS]
            ax.plot(TRS, medians, marker="o", color=STYLE[method], label=method)
        ax.set_yscale("log")
        ax.set_xlabel("repetition time (s)")
        ax.set_title(f"{part} volumes", fontsize=10)
        ax.grid(True, which="both", alpha=0.3)
        if k == 0:
            ax.set_ylabel("error / uncorrected error")
            ax.legend(fontsize=8)
    fig.tight_layout()
    _save(fig, path)


def glm_figure(rows: list[GlmRow], path: Path) -> None:
    fig = Figure(figsize=(7.5, 3.4))
    ax, bx = fig.add_subplot(1, 2, 1), fig.add_subplot(1, 2, 2)
    for corrected, colour, label in ((False, "#a33", "uncorrected"), (True, "#1f5f8b",
                                                                      "corrected")):
        sel = [r for r in rows if r.corrected == corrected]
        ax.plot([r.tr for r in sel], [100 * r.late_bias for r in sel], marker="o",
                color=colour, label=label)
        bx.plot([r.tr for r in sel], [r.late_t for r in sel], marker="o", color=colour,
                label=label)
    ax.axhline(0, color="#777", lw=0.8)
    ax.set_xlabel("repetition time (s)")
    ax.set_ylabel("bias of the effect estimate (%)")
    ax.set_title("latest-acquired slices", fontsize=10)
    bx.set_xlabel("repetition time (s)")
    bx.set_ylabel("t statistic")
    bx.set_title("latest-acquired slices", fontsize=10)
    for axis in (ax, bx):
        axis.grid(True, alpha=0.3)
        axis.legend(fontsize=8)
    fig.tight_layout()
    _save(fig, path)


def _accuracy_table(rows: list[AccuracyRow]) -> str:
    by: dict[tuple[float, str], list[AccuracyRow]] = defaultdict(list)
    for r in rows:
        by[(r.tr, r.method)].append(r)
    lines = ["| TR (s) | " + " | ".join(f"{m} interior | {m} edge" for m in METHODS) + " |",
             "|---:|" + "---:|" * (2 * len(METHODS))]
    for tr in TRS:
        cells = []
        for m in METHODS:
            sel = by[(tr, m)]
            cells.append(f"{statistics.median(r.interior for r in sel):.3f}")
            cells.append(f"{statistics.median(r.edge for r in sel):.3f}")
        lines.append(f"| {tr:g} | " + " | ".join(cells) + " |")
    return "\n".join(lines)


def _glm_table(rows: list[GlmRow]) -> str:
    lines = ["| TR (s) | late-slice bias, uncorrected | corrected | late-slice t, uncorrected "
             "| corrected |", "|---:|---:|---:|---:|---:|"]
    for tr in GLM_TRS:
        raw = next(r for r in rows if r.tr == tr and not r.corrected)
        fixed = next(r for r in rows if r.tr == tr and r.corrected)
        lines.append(f"| {tr:g} | {100 * raw.late_bias:+.1f} % | {100 * fixed.late_bias:+.1f} % "
                     f"| {raw.late_t:.1f} | {fixed.late_t:.1f} |")
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--out", type=Path, default=Path("docs"))
    args = parser.parse_args()
    figures = args.out / "figures"
    figures.mkdir(parents=True, exist_ok=True)
    started = time.perf_counter()
    acc = accuracy(TRS, SLICES, SCHEMES)
    glm = glm_effect(GLM_TRS)
    protocols = generated_protocols()
    inf = inference(protocols)
    accuracy_figure(acc, figures / "correction-accuracy.svg")
    glm_figure(glm, figures / "glm-late-slices.svg")
    numbers = {"accuracy": [asdict(r) for r in acc], "glm": [asdict(r) for r in glm],
               "inference": [asdict(r) | {"accuracy": r.accuracy} for r in inf]}
    (args.out / "validation.json").write_text(json.dumps(numbers, indent=1) + "\n")
    inference_table = "\n".join(
        ["| times rounded to | protocols | groups and factor recovered |", "|---|---:|---:|"]
        + [f"| {r.rounding} | {r.protocols} | {100 * r.accuracy:.1f} % |" for r in inf])
    short = [r for r in glm if r.tr == min(GLM_TRS)]
    raw = next(r for r in short if not r.corrected)
    fixed = next(r for r in short if r.corrected)
    text = TEMPLATE.format(
        short_tr=min(GLM_TRS),
        short_bias=100 * raw.late_bias,
        short_t_raw=raw.late_t,
        short_t_fixed=fixed.late_t,
        accuracy_table=_accuracy_table(acc),
        glm_table=_glm_table(glm),
        inference_table=inference_table,
        n_configs=len({(r.tr, r.n_slices, r.scheme) for r in acc}),
        n_protocols=len(protocols),
    )
    (args.out / "validation.md").write_text(text)
    print(f"wrote {args.out / 'validation.md'} in {time.perf_counter() - started:.0f} s")


TEMPLATE = """# Validation: is the correction right?

Everything here is simulated with known ground truth and regenerated by
`make validate` (`python validation/make_report.py`; seconds on 2 cores; numbers in
`docs/validation.json`). The code is `validation/study.py` and
`slicetime/pipelines/simulate.py`; the tests in `tests/test_validation.py`
assert the headline numbers on reduced versions of the same studies.

## 1. Correction accuracy

Simulated runs (4×4 voxels per slice, 200 volumes) whose slices sample a
BOLD-like signal at their own acquisition times: a baseline, events (1 s
boxcars with jittered 5–13 s gaps) convolved with the canonical double-gamma
response, and a slow drift. {n_configs} protocols: TR 0.7, 1, 2 and 3 s; 24,
40 and 60 slices; sequential, interleaved, multiband ×2 and ×3. Every slice is
aligned to the middle of the acquisition and compared with the noiseless
signal at that time. The figure is the mean absolute error divided by the
error of doing nothing (median over protocols), in interior volumes and in the
first and last 10 % of the run.

![correction accuracy](figures/correction-accuracy.svg)

{accuracy_table}

What this shows:

- At short TRs every method removes most of the timing error; the Fourier and
  windowed-sinc methods are best, linear interpolation clearly worst.
- At long TRs the response itself is no longer band-limited relative to the
  sampling (a canonical response has power above 0.17 Hz, the Nyquist frequency
  at TR 3 s), so no interpolation can recover it exactly: the remaining error
  is the information the samples do not hold, not an engine error. For truly
  band-limited signals the engines reach their design targets (Fourier error
  under 2 % of the uncorrected error, see `tests/test_engines.py`).
- Edge and interior volumes come out alike here, because these runs begin and
  end quietly (no events in the first 4 s and the last 20 s), as most event
  designs do; a signal that is busy at the ends is harder there, where every
  method has to extend the series beyond the samples.

## 2. The downstream effect on a GLM

The same kind of run (9 interleaved slices, 180 volumes, noise), fitted with
nilearn's `FirstLevelModel` with `slice_time_ref = StartTime / TR` as our
correction output records it, with and without correction. The bias is the
effect estimate of the latest-acquired slices against a perfectly timed voxel;
the t statistic is averaged over those slices.

![GLM effect](figures/glm-late-slices.svg)

{glm_table}

Uncorrected, the late slices' effect is underestimated and its t statistic
drops, more so the longer the TR; correction brings the estimates back to the
truth and the t statistics up. This agrees in direction with Sladky et al.
(2011, NeuroImage 58:588–594: slice-timing effects grow with TR and correction
recovers sensitivity) and with Parker & Razlighi (2019, Front. Neurosci.
13:821: correction helps even at sub-second TRs — here {short_bias:+.1f} % bias
and t {short_t_raw:.1f} → {short_t_fixed:.1f} at TR {short_tr:g} s).

## 3. Scheme inference

{n_protocols} generated protocols (8–72 slices; sequential and interleaved
with steps 2–4 and every valid start, ascending and descending; multiband
×1–4; TRs 0.5–3 s), with times exact or rounded as converters round them
(1 ms, 2.5 ms). A protocol counts as recovered when inference returns exactly
its excitation groups in acquisition order and its multiband factor.
Protocols whose groups are less than three rounding steps apart are left out
(rounding makes them indistinguishable).

{inference_table}

## What this does not show

The study uses simulated data with a known signal; real data add motion
(slice-timing and motion correction interact), spin history and physiology
that is not a simple delayed copy. It says nothing about whether a sidecar's
claimed order is true: that needs evidence from the data (a separate piece of
work). Corrected data must still be checked before publication.
"""


if __name__ == "__main__":
    main()
