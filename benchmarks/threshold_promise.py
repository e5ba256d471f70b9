"""Does the operating threshold keep its recall promise on photos it was not set on?

For each trained experiment given, the checkpoint scores every labelled patch of its
validation and test photos once. Then, many times over, those photos are dealt at random
into two halves of equal photo count (whole photos, as the split does): the threshold is
chosen on one half and the recall it reaches is measured on the other. Two rules:

- ``promise``: :func:`trainkit.metrics.threshold_with_recall_promise` (recall >= target
  with the stated confidence given the half's crack count, counted for the photos they
  cluster in), what ``evaluate`` uses now;
- ``edge``: :func:`trainkit.metrics.threshold_for_recall` (the highest threshold reaching
  the target on the half's own cracks), what ``evaluate`` used before.

Reported per experiment and rule: how often the other half's recall reached the target
(the promise says: at least the confidence, when the promise is made), how often the
promise could be made, the recall and false-alarm rate reached (median and 10th
percentile), and the thresholds. Photos are dealt, not patches, because cracks of one
photo resemble each other; the promise counts cracks as independent, so this is the
honest check of it.

Usage: python benchmarks/threshold_promise.py OUT EXP [EXP ...] [--draws 1000]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

CAUTION = (
    "The screener is a triage aid, not an inspection; these figures hold only for photos "
    "like the ones checked here; defer to local codes and licensed engineers."
)


def scored_photos(exp: Path) -> dict:
    """The experiment's validation and test patches scored: photo, crack truth, score."""
    from trainkit.core.contract import screening_probability
    from trainkit.judging.evaluation import EvaluationOptions, _run_experiment

    run = _run_experiment(exp, EvaluationOptions(), None)
    photos, crack, score = [], [], []
    for s in (run.val, run.test):
        photos += list(s.photos)
        crack.append(np.asarray(s.labels) != 0)
        score.append(screening_probability(np.asarray(s.probs, dtype=np.float64)))
    return {
        "photos": np.array(photos),
        "crack": np.concatenate(crack),
        "score": np.concatenate(score),
    }


def resplits(data: dict, *, draws: int, target: float, confidence: float, seed: int) -> dict:
    from trainkit import metrics as M

    rng = np.random.default_rng(seed)
    names, idx = np.unique(data["photos"], return_inverse=True)
    y, p, photos = data["crack"], data["score"], data["photos"]
    out: dict[str, dict[str, list]] = {
        r: {"kept": [], "recall": [], "far": [], "t": [], "promised": []}
        for r in ("promise", "edge")
    }
    for _ in range(draws):
        half = rng.permutation(names.size) < names.size // 2
        cal, new = half[idx], ~half[idx]
        if not y[cal].any() or not y[new].any():
            continue
        pr = M.threshold_with_recall_promise(
            y[cal], p[cal], target_recall=target, confidence=confidence, photos=photos[cal]
        )
        edge = M.threshold_for_recall(y[cal], p[cal], target_recall=target)
        for rule, t, promised in (("promise", pr.threshold, pr.kept), ("edge", edge, False)):
            s = M.screening_scores(y[new], p[new], threshold=t)
            o = out[rule]
            o["recall"].append(s["recall"])
            o["far"].append(s["false_alarm_rate"])
            o["kept"].append(s["recall"] >= target)
            o["t"].append(t)
            o["promised"].append(promised)
    res = {}
    for rule, o in out.items():
        rec, far = np.array(o["recall"]), np.array(o["far"], dtype=float)
        kept, promised = np.array(o["kept"]), np.array(o["promised"])
        res[rule] = {
            "draws": int(kept.size),
            "target_reached_share": round(float(kept.mean()), 4),
            "promise_made_share": round(float(promised.mean()), 4),
            "target_reached_share_when_promised": round(float(kept[promised].mean()), 4)
            if promised.any()
            else None,
            "recall_median": round(float(np.median(rec)), 4),
            "recall_p10": round(float(np.quantile(rec, 0.1)), 4),
            "false_alarm_rate_median": round(float(np.nanmedian(far)), 4),
            "false_alarm_rate_p90": round(float(np.nanquantile(far, 0.9)), 4),
            "threshold_median": round(float(np.median(o["t"])), 5),
        }
    return res


def main(argv: list[str]) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out", type=Path, help="results folder (threshold_promise.json)")
    ap.add_argument("experiments", type=Path, nargs="+", help="trained experiment folders")
    ap.add_argument("--draws", type=int, default=1000)
    ap.add_argument("--target", type=float, default=0.95)
    ap.add_argument("--confidence", type=float, default=0.9)
    ap.add_argument("--seed", type=int, default=24)
    args = ap.parse_args(argv)
    t0 = time.perf_counter()
    runs = []
    for exp in args.experiments:
        data = scored_photos(exp)
        res = resplits(
            data, draws=args.draws, target=args.target, confidence=args.confidence, seed=args.seed
        )
        row = {
            "experiment": str(exp),
            "photos": int(np.unique(data["photos"]).size),
            "patches": int(data["crack"].size),
            "cracks": int(data["crack"].sum()),
            **res,
        }
        runs.append(row)
        for rule in ("promise", "edge"):
            r = res[rule]
            print(
                f"{exp.name:>20} {rule:>8}: target reached in {r['target_reached_share']:.1%} "
                f"of {r['draws']} draws (promise made in {r['promise_made_share']:.0%}); recall "
                f"median {r['recall_median']:.3f}, p10 {r['recall_p10']:.3f}; false alarms "
                f"median {r['false_alarm_rate_median']:.3f}"
            )
    result = {
        "benchmark": "threshold_promise",
        "caution": CAUTION,
        "issue": 24,
        "target_recall": args.target,
        "confidence": args.confidence,
        "draws": args.draws,
        "how": "validation and test photos of each experiment dealt at random into two halves "
        "of equal photo count; the threshold set on one half, recall measured on the other",
        "runs": runs,
        "seconds": round(time.perf_counter() - t0, 1),
    }
    args.out.mkdir(parents=True, exist_ok=True)
    (args.out / "threshold_promise.json").write_text(json.dumps(result, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
