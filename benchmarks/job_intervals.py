"""Coverage and width of a job's 95 % recall and false-alarm intervals over repeated samples.

A simulated job (invented here, no real photos): a fixed population of scan cells, each
with a screening probability and a ground truth. Most cells are clean (screening
probability ~ Beta(0.7, 12), plus a share of "confusers" ~ Beta(4, 4) that the screener
half-flags); a few % are cracked (~ Beta(6, 1.2)), and a share of the cracks are cells
the screener misses with low probabilities (~ Beta(1, 10)). The job is fixed; only the
sample varies (design-based coverage). For each number of answered cells (100, 300,
1,000) the benchmark draws 200 stratified samples (trainkit.jobs.design.draw_sample,
seeds 0..199), answers them from the ground truth (a simulated reviewer), and counts how
often each interval method's 95 % interval contains the job's true recall and
false-alarm rate, with the mean interval width. Target (issue 16): coverage >= 0.93.

Three jobs: A and B with 1 % and 6 % of the cracks hidden at low probabilities (plus the
Beta(6, 1.2) cracks that fall below the threshold by chance); C, a harder one, as B but
every missed crack takes the screening probability of a random clean cell of the ``rest``
pile, so the screener's probabilities say nothing about where in that pile its misses
are (the gain of cutting ``rest`` into bands is not assumed).

Designs and interval methods side by side, on the same seeds:

- ``old``: three strata (``rest_bands=1``), ``beta-binomial`` (the previous default);
- ``old+pooled``: three strata, ``pooled-beta-binomial``;
- ``bands``: ``rest`` cut into 3 bands (the new default design), ``beta-binomial``;
- ``bands+pooled``: the new default (3 bands, ``pooled-beta-binomial``);
- ``bands+jeffreys``: 3 bands, ``jeffreys``;
- with ``--all-methods`` also ``korn-graubard`` and ``wald`` on both designs.

Usage: python benchmarks/job_intervals.py [--reps 200] [--cells 60000] [--json OUT.json]
"""

from __future__ import annotations

import argparse
import sys
import time

import numpy as np

from trainkit.core.fsutil import atomic_write_json
from trainkit.jobs.design import draw_sample
from trainkit.jobs.estimate import estimate_job

THRESHOLD = 0.5
SIZES = (100, 300, 1000)

#: name -> (rest_bands, interval method)
CONFIGS: dict[str, tuple[int, str]] = {
    "old": (1, "beta-binomial"),
    "old+pooled": (1, "pooled-beta-binomial"),
    "bands": (3, "beta-binomial"),
    "bands+pooled": (3, "pooled-beta-binomial"),
    "bands+jeffreys": (3, "jeffreys"),
}
EXTRA: dict[str, tuple[int, str]] = {
    "old+korn-graubard": (1, "korn-graubard"),
    "old+wald": (1, "wald"),
    "bands+korn-graubard": (3, "korn-graubard"),
    "bands+wald": (3, "wald"),
}


def simulated_job(
    n_cells: int, prevalence: float, miss_share: float, confuser_share: float, seed: int
) -> tuple[np.ndarray, np.ndarray]:
    """Screening probabilities and ground truth of one invented job's cells."""
    rng = np.random.default_rng(seed)
    crack = rng.random(n_cells) < prevalence
    p = rng.beta(0.7, 12.0, n_cells)
    confuser = ~crack & (rng.random(n_cells) < confuser_share)
    p[confuser] = rng.beta(4.0, 4.0, int(confuser.sum()))
    missed = crack & (rng.random(n_cells) < miss_share)
    found = crack & ~missed
    p[found] = rng.beta(6.0, 1.2, int(found.sum()))
    p[missed] = rng.beta(1.0, 10.0, int(missed.sum()))
    return p, crack


def uninformative_misses(p: np.ndarray, crack: np.ndarray, seed: int) -> np.ndarray:
    """Give every missed crack (p < t) the probability of a random clean ``rest`` cell."""
    rng = np.random.default_rng(seed)
    out = p.copy()
    pile = p[~crack & (p < THRESHOLD * 0.2)]
    missed = crack & (p < THRESHOLD)
    out[missed] = rng.choice(pile, int(missed.sum()))
    return out


def run_job(
    p: np.ndarray, y: np.ndarray, reps: int, configs: dict[str, tuple[int, str]], quiet: bool
) -> list[dict]:
    """Coverage and mean width per sample size, design and interval method."""
    flagged = p >= THRESHOLD
    true_r = float((y & flagged).sum() / y.sum())
    true_a = float((~y & flagged).sum() / (~y).sum())
    rows = []
    designs = sorted({b for b, _ in configs.values()})
    for n in SIZES:
        hits = {c: np.zeros(2) for c in configs}
        widths = {c: np.zeros(2) for c in configs}
        t0 = time.perf_counter()
        alloc = {}
        for rep in range(reps):
            samples = {b: draw_sample(p, THRESHOLD, n, seed=rep, rest_bands=b) for b in designs}
            for c, (b, m) in configs.items():
                s = samples[b]
                alloc[c] = [r["sampled"] for r in s.strata_table()]
                e = estimate_job(s.stratum, y[s.index], s.population, method=m, seed=rep)
                for j, (f, truth) in enumerate(((e.recall, true_r), (e.false_alarm_rate, true_a))):
                    hits[c][j] += f.low <= truth <= f.high
                    widths[c][j] += f.high - f.low
            if not quiet and (rep + 1) % 50 == 0:
                print(f"  n={n}: {rep + 1}/{reps} samples", file=sys.stderr, flush=True)
        for c, (b, m) in configs.items():
            rows.append(
                {
                    "answered": n,
                    "design": c,
                    "rest_bands": b,
                    "method": m,
                    "true_recall": true_r,
                    "true_false_alarm_rate": true_a,
                    "recall_coverage": hits[c][0] / reps,
                    "recall_mean_width": widths[c][0] / reps,
                    "false_alarm_coverage": hits[c][1] / reps,
                    "false_alarm_mean_width": widths[c][1] / reps,
                    "allocation": alloc[c],
                    "seconds_all_configs": time.perf_counter() - t0,
                }
            )
    return rows


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=200)
    ap.add_argument("--cells", type=int, default=60000)
    ap.add_argument("--json", default=None, help="also write the rows as JSON here")
    ap.add_argument("--all-methods", action="store_true", help="add korn-graubard and wald")
    ap.add_argument("--quiet", action="store_true")
    args = ap.parse_args(argv)
    configs = {**CONFIGS, **(EXTRA if args.all_methods else {})}
    p_b, y_b = simulated_job(args.cells, 0.03, 0.06, 0.06, seed=17)
    jobs = {
        "A, 1 % of cracks hidden low": simulated_job(args.cells, 0.03, 0.01, 0.06, seed=16),
        "B, 6 % of cracks hidden low": (p_b, y_b),
        "C, as B, misses spread uniformly over rest": (uninformative_misses(p_b, y_b, 18), y_b),
    }
    out = {}
    for name, (p, y) in jobs.items():
        rows = run_job(p, y, args.reps, configs, args.quiet)
        out[name] = rows
        if args.quiet:
            continue
        r0 = rows[0]
        print(
            f"\njob {name}: {args.cells} cells, {int(y.sum())} cracked, flagged share "
            f"{np.mean(p >= THRESHOLD):.3f}, true recall {r0['true_recall']:.4f}, "
            f"true false-alarm rate {r0['true_false_alarm_rate']:.4f}; {args.reps} samples each"
        )
        print(
            f"{'n':>5} {'design+method':<20} {'recall cov':>10} {'width':>7} {'FA cov':>7} "
            f"{'width':>7}  n_h"
        )
        for r in rows:
            print(
                f"{r['answered']:>5} {r['design']:<20} {r['recall_coverage']:>10.3f} "
                f"{r['recall_mean_width']:>7.3f} {r['false_alarm_coverage']:>7.3f} "
                f"{r['false_alarm_mean_width']:>7.4f}  {r['allocation']}"
            )
    if args.json:
        atomic_write_json(args.json, out, indent=2)
    return 0


if __name__ == "__main__":
    sys.exit(main())
