"""Held-out accuracy of the default recipe trained from random initialisation, in a time budget.

The data: the repository's tiny dataset plus a larger set made by the kit's synthetic
generator (an invented owner's structures; no real photos). Both are tiled at 128 px
into one workspace, labelled from the generator's ground truth, and split by photo, so
the test subset is photos the network never saw. The default recipe
(MobileNetV3-Small, random initialisation: no pretrained weights here) trains for as
many epochs as fit the budget (estimated from a short throughput probe).

Reported on the held-out photos, with the screening threshold chosen on validation at
the false-alarm budget (never on the test photos):
- crack recall and false-alarm rate, with Wilson 95 % intervals (counts given);
- the oracle figure (best test recall within the budget), for reference only;
- orientation accuracy on correctly flagged linear-crack patches (true class one of
  the four orientation classes, flagged, and argmax over the crack classes right).

Usage: python benchmarks/held_out.py OUT [--photos 120] [--minutes 15] [--seed 7001]
"""

from __future__ import annotations

import argparse
import csv
import json
import shutil
import sys
import time
from pathlib import Path

import numpy as np

from trainkit.core.contract import screening_probability

REPO = Path(__file__).resolve().parents[1]


def _renamed_copy(src: Path, dst: Path, prefix: str) -> None:
    """Copy a synth dataset with every photo name prefixed (so two sets never share a name)."""
    (dst / "photos").mkdir(parents=True, exist_ok=True)
    for f in (src / "photos").iterdir():
        shutil.copy2(f, dst / "photos" / f"{prefix}{f.name}")
    for name in ("labels.csv", "scale.csv"):
        rows = list(csv.reader((src / name).open(encoding="utf-8")))
        with (dst / name).open("w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(rows[0])
            for r in rows[1:]:
                w.writerow([prefix + r[0], *r[1:]])


def build_workspace(out: Path, n_photos: int, seed: int):
    from trainkit.core.decode import list_images
    from trainkit.core.taxonomy import load_class_set
    from trainkit.demo import TINY_DATASET, tiny_dataset_dir
    from trainkit.intake.sidecar import read_sidecar
    from trainkit.labels.build import build_workspace as build
    from trainkit.store.workspace import Workspace
    from trainkit.synth import SynthOptions, write_dataset

    cs = load_class_set("orientation")
    ws_dir = out / "workspace"
    if (ws_dir / "workspace.sqlite").exists():  # reuse a workspace built by an earlier run
        return Workspace.open(ws_dir)
    raw = out / "synth-raw"
    write_dataset(
        raw,
        n_photos=n_photos,
        seed=seed,
        tile_px=TINY_DATASET["tile_px"],
        options=SynthOptions(height=TINY_DATASET["height"], width=TINY_DATASET["width"]),
        class_set=cs,
    )
    extra = out / "synth-extra"
    _renamed_copy(raw, extra, "x-")
    sources = (tiny_dataset_dir(), extra)
    return build(
        [f for data in sources for f in list_images([data / "photos"])],
        ws_dir,
        class_set=cs,
        tile_px=TINY_DATASET["tile_px"],
        sidecar={k: v for data in sources for k, v in read_sidecar(data / "scale.csv").items()},
        group_by="photo",
        labels_csv=[data / "labels.csv" for data in sources],
        reviewer="synth-ground-truth",
        split={"test_fraction": 0.2, "val_fraction": 0.15, "seed": 0},
    ).workspace


def _wilson(k: int, n: int) -> list[float]:
    from statsmodels.stats.proportion import proportion_confint

    if n == 0:
        return [None, None]
    lo, hi = proportion_confint(k, n, alpha=0.05, method="wilson")
    return [round(float(lo), 4), round(float(hi), 4)]


def probe_images_per_second(cfg, data, num_classes: int) -> float:
    """Training images per second of ``cfg``'s network: 12 timed steps (after 2 warm-up
    steps) on one batch of real patches, at the recipe's thread count."""
    import torch

    from trainkit.learning.network import build_network
    from trainkit.learning.steps import cpu_threads

    torch.set_num_threads(cfg.threads or cpu_threads())
    net = build_network(cfg, num_classes)
    opt = torch.optim.AdamW(net.parameters(), lr=cfg.lr)
    net.train()
    x = torch.from_numpy(np.ascontiguousarray(data.images[: cfg.batch_size]))
    y = torch.from_numpy(data.labels[: cfg.batch_size])
    for i in range(14):
        if i == 2:
            t0 = time.perf_counter()
        loss = torch.nn.functional.cross_entropy(net(x), y)
        opt.zero_grad()
        loss.backward()
        opt.step()
    return 12 * cfg.batch_size / (time.perf_counter() - t0)


def main(argv: list[str]) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out", type=Path)
    ap.add_argument("--photos", type=int, default=120)
    ap.add_argument("--seed", type=int, default=7001)
    ap.add_argument("--minutes", type=float, default=15.0)
    ap.add_argument("--budget", type=float, default=0.05)
    ap.add_argument("--config", default="default")
    ap.add_argument("--epochs", type=int, default=None, help="skip the probe and use this")
    args = ap.parse_args(argv)

    import torch

    from trainkit.learning.config import load_train_config
    from trainkit.learning.data import load_patch_set
    from trainkit.learning.training import train

    t0 = time.perf_counter()
    args.out.mkdir(parents=True, exist_ok=True)
    ws = build_workspace(args.out, args.photos, args.seed)
    t_data = time.perf_counter() - t0
    cs = ws.class_set
    train_set = load_patch_set(ws, "train", cs)
    n_train = len(train_set)

    cfg = load_train_config(args.config)
    epochs = args.epochs
    probe_ips = None
    if epochs is None:
        # Throughput probe: 12 training steps on real patches, then fit the budget with a margin
        # for validation passes (about 10 % of an epoch's time here).
        probe_ips = probe_images_per_second(cfg, train_set, cs.num_classes)
        epoch_s = n_train / probe_ips * 1.15
        epochs = max(1, int(args.minutes * 60 * 0.85 / epoch_s))
    cfg = load_train_config(args.config, {"epochs": epochs})
    exp = args.out / "run"
    t1 = time.perf_counter()
    summary = train(ws, exp, cfg, resume=False)
    t_train = time.perf_counter() - t1

    # The library's own evaluation: threshold chosen on validation within the budget,
    # figures on the held-out test photos (exactly what `trainkit evaluate` reports).
    from trainkit.judging.evaluation import evaluate_experiment
    from trainkit.metrics import recall_at_false_alarm

    metrics = evaluate_experiment(exp, split="test", max_false_alarms=args.budget)
    s = metrics["screening"]
    thr = s["threshold"]
    tp, n_pos, fp, n_neg = s["tp"], s["tp"] + s["fn"], s["fp"], s["fp"] + s["tn"]
    val, test = load_patch_set(ws, "val", cs), load_patch_set(ws, "test", cs)
    with (exp / "evaluation" / "predictions.csv").open(newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    pt = np.array([[float(r[f"p_{n}"]) for n in cs.names] for r in rows])
    labels = np.array([cs.names.index(r["true"]) for r in rows])
    crack_t = labels != 0
    flagged = screening_probability(pt) >= thr
    # Orientation: among flagged linear cracks, is the likeliest crack class the true one?
    linear = [i for i, c in enumerate(cs.names) if cs.angle_centres[i] is not None]
    sel = flagged & np.isin(labels, linear)
    crack_cols = list(range(1, cs.num_classes))
    pred_crack = np.array(crack_cols)[pt[:, crack_cols].argmax(1)]
    k_or = int((pred_crack[sel] == labels[sel]).sum())
    n_or = int(sel.sum())
    result = {
        "data": {
            "photos": ws.summary()["photos"],
            "training_patches": n_train,
            "validation_patches": len(val),
            "test_patches": len(test),
            "test_photos": len(set(test.photos)),
            "test_crack_patches": n_pos,
            "seconds_to_build": round(t_data, 1),
        },
        "training": {
            "config": args.config,
            "backbone": cfg.backbone,
            "weights": cfg.weights,
            "input_px": ws.tile_px,
            "epochs": epochs,
            "probe_images_per_s": None if probe_ips is None else round(probe_ips, 1),
            "median_train_images_per_s": round(summary["median_images_per_second"], 1),
            "best_epoch": summary["best_epoch"],
            "minutes": round(t_train / 60, 2),
            "threads": torch.get_num_threads(),
        },
        "held_out": {
            "false_alarm_budget": args.budget,
            "threshold_from_validation": round(thr, 6),
            "crack_recall": round(tp / n_pos, 4) if n_pos else None,
            "crack_recall_k_n": [tp, n_pos],
            "crack_recall_wilson95": _wilson(tp, n_pos),
            "false_alarm_rate": round(fp / n_neg, 4) if n_neg else None,
            "false_alarm_k_n": [fp, n_neg],
            "false_alarm_wilson95": _wilson(fp, n_neg),
            "oracle_recall_at_budget_on_test": round(
                recall_at_false_alarm(crack_t, screening_probability(pt), budget=args.budget), 4
            ),
            "orientation_accuracy_flagged_linear": round(k_or / n_or, 4) if n_or else None,
            "orientation_k_n": [k_or, n_or],
            "orientation_wilson95": _wilson(k_or, n_or),
        },
    }
    (args.out / "held_out.json").write_text(json.dumps(result, indent=2), encoding="utf-8")
    print(json.dumps(result, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
