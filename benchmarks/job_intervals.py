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

Two jobs: 1 % and 6 % of the cracks hidden at low probabilities (plus the Beta(6, 1.2)
cracks that fall below the threshold by chance).

Usage: python benchmarks/job_intervals.py [--reps 200] [--cells 60000] [--json OUT.json]
"""

from __future__ import annotations

import argparse
import sys
import time

import numpy as np

from trainkit.core.fsutil import atomic_write_json
from trainkit.jobs.design import draw_sample
from trainkit.jobs.estimate import INTERVAL_METHODS, estimate_job

THRESHOLD = 0.5
SIZES = (100, 300, 1000)


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


def run_job(p: np.ndarray, y: np.ndarray, reps: int) -> list[dict]:
    """Coverage and mean width per sample size and interval method."""
    flagged = p >= THRESHOLD
    true_r = float((y & flagged).sum() / y.sum())
    true_a = float((~y & flagged).sum() / (~y).sum())
    rows = []
    for n in SIZES:
        hits = {m: np.zeros(2) for m in INTERVAL_METHODS}
        widths = {m: np.zeros(2) for m in INTERVAL_METHODS}
        t0 = time.perf_counter()
        for rep in range(reps):
            s = draw_sample(p, THRESHOLD, n, seed=rep)
            for m in INTERVAL_METHODS:
                e = estimate_job(s.stratum, y[s.index], s.population, method=m, seed=rep)
                for j, (f, truth) in enumerate(((e.recall, true_r), (e.false_alarm_rate, true_a))):
                    hits[m][j] += f.low <= truth <= f.high
                    widths[m][j] += f.high - f.low
        for m in INTERVAL_METHODS:
            rows.append(
                {
                    "answered": n,
                    "method": m,
                    "true_recall": true_r,
                    "true_false_alarm_rate": true_a,
                    "recall_coverage": hits[m][0] / reps,
                    "recall_mean_width": widths[m][0] / reps,
                    "false_alarm_coverage": hits[m][1] / reps,
                    "false_alarm_mean_width": widths[m][1] / reps,
                    "allocation": s.allocated.tolist(),
                    "seconds_all_methods": time.perf_counter() - t0,
                }
            )
    return rows


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=200)
    ap.add_argument("--cells", type=int, default=60000)
    ap.add_argument("--json", default=None, help="also write the rows as JSON here")
    ap.add_argument("--quiet", action="store_true")
    args = ap.parse_args(argv)
    jobs = {
        "A, 1 % of cracks hidden low": simulated_job(args.cells, 0.03, 0.01, 0.06, seed=16),
        "B, 6 % of cracks hidden low": simulated_job(args.cells, 0.03, 0.06, 0.06, seed=17),
    }
    out = {}
    for name, (p, y) in jobs.items():
        rows = run_job(p, y, args.reps)
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
            f"{'n':>5} {'method':<14} {'recall cov':>10} {'width':>7} {'FA cov':>7} {'width':>7}  n_h"
        )
        for r in rows:
            print(
                f"{r['answered']:>5} {r['method']:<14} {r['recall_coverage']:>10.3f} "
                f"{r['recall_mean_width']:>7.3f} {r['false_alarm_coverage']:>7.3f} "
                f"{r['false_alarm_mean_width']:>7.4f}  {r['allocation']}"
            )
    if args.json:
        atomic_write_json(args.json, out, indent=2)
    return 0


if __name__ == "__main__":
    sys.exit(main())
