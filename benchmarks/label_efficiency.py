"""Label efficiency: held-out crack recall at a false-alarm budget against the number of labels.

Question: how many labelled patches does a screener need? For each training-set size
(about 100, 300, 1,000 and 3,000 patches, nested random subsets of one training
subset), two networks train in the same CPU-time budget:

- pretrained: EfficientNet-Lite0 from its packaged ImageNet weights, with the default
  recipe's fine-tuning settings (head-only first for ``head_epochs / epochs`` of the
  budget, then the whole network with the backbone at ``backbone_lr_scale`` of the
  learning rate and its BatchNorm statistics frozen);
- scratch: MobileNetV3-Small from random initialisation (the kit's previous default,
  learning rate 2e-3, no head stage).

The budget is CPU time of this process (``time.process_time()``, all threads), not wall
time: other jobs share the machine's cores, and CPU time is what they cannot steal. The
learning rate follows warm-up and cosine decay over the budget's fraction used (the
same shape as :func:`trainkit.learning.steps.get_lr`). Evaluation is not counted.

Data: the repository's tiny dataset plus photos made with the kit's synthetic generator
(benchmarks/held_out.py builds the workspace), tiled at 128 px and split by photo. The
screening threshold is chosen on the validation photos at the false-alarm budget and
applied to the test photos; recall there is reported with its Wilson 95 % interval
(``trainkit.metrics.recall_interval``).

Usage: python benchmarks/label_efficiency.py OUT [--photos 160] [--cpu-seconds 100]
       [--sizes 100,300,1000,3000] [--json benchmarks/results/label_efficiency.json]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from held_out import build_workspace  # noqa: E402  (the benchmark folder is not a package)

WARMUP_FRACTION = 0.05  # of each stage's budget


def _lr(progress: float, peak: float) -> float:
    from trainkit.learning.steps import get_lr

    return get_lr(
        int(progress * 1000),
        total_steps=1000,
        warmup_steps=int(WARMUP_FRACTION * 1000),
        peak_lr=peak,
    )


class _Upscaled:
    """A network fed patches upscaled (bicubic, in the graph) to ``px``: the input-size study."""

    @staticmethod
    def wrap(network, px: int):
        from torch import nn

        class Up(nn.Sequential):
            def forward(self, x):
                x = self[0](x)  # Preprocess: uint8 NHWC -> normalised NCHW
                x = nn.functional.interpolate(x, size=(px, px), mode="bicubic", align_corners=False)
                return self[1](x)

        return Up(network[0], network[1]) if px else network


def train_in_budget(
    cfg, train_set, class_set, cpu_seconds: float, seed: int, input_px: int = 0
) -> dict:
    """Train ``cfg``'s network on ``train_set`` until ``cpu_seconds`` of process CPU time are used.

    ``input_px`` > 0 upscales the patches inside the network to that size (bicubic).
    """
    import torch
    from torch import nn

    from trainkit.learning.data import Augmenter
    from trainkit.learning.network import build_network
    from trainkit.learning.steps import (
        _augmented_batches,
        class_weights,
        epoch_order,
        set_stage,
    )
    from trainkit.learning.training import build_optimizer

    torch.manual_seed(seed)
    # set-up (weights, imports) not counted
    model = _Upscaled.wrap(build_network(cfg, class_set.num_classes), input_px)
    optimizer = build_optimizer(model, cfg)
    loss_fn = nn.CrossEntropyLoss(
        weight=class_weights(train_set.labels, class_set.num_classes, cfg.class_weighting),
        label_smoothing=cfg.label_smoothing,
    )
    augment = Augmenter(class_set, cfg.augment, seed=seed)
    rng = np.random.default_rng(seed)
    t0 = time.process_time()
    head_budget = cpu_seconds * cfg.head_epochs / cfg.epochs
    stage, steps, seen, wall0 = None, 0, 0, time.perf_counter()
    done = False
    while not done:
        order = epoch_order(train_set.labels, rng, cfg.sampling)
        for x, y in _augmented_batches(train_set, order, augment, rng, cfg.batch_size):
            used = time.process_time() - t0
            if used >= cpu_seconds:
                done = True
                break
            now = "head" if used < head_budget else "full"
            if now != stage:
                stage = now
                set_stage(model, cfg.backbone, stage, freeze_bn_stats=cfg.freeze_bn_stats)
            if stage == "head":
                lr = _lr(used / head_budget, cfg.lr)
            else:
                lr = _lr((used - head_budget) / (cpu_seconds - head_budget), cfg.lr)
            for group in optimizer.param_groups:
                group["lr"] = lr * group.get("lr_scale", 1.0)
            loss = loss_fn(model(x), y)
            optimizer.zero_grad(set_to_none=True)
            loss.backward()
            optimizer.step()
            steps += 1
            seen += len(y)
    cpu = time.process_time() - t0
    wall = time.perf_counter() - wall0
    model.eval()
    return {
        "model": model,
        "steps": steps,
        "patches_seen": seen,
        "epochs_equivalent": round(seen / len(train_set), 2),
        "cpu_seconds": round(cpu, 1),
        "wall_seconds": round(wall, 1),
        "patches_per_cpu_second": round(seen / cpu, 2) if cpu > 0 else None,
    }


def held_out_recall(model, val, test, num_classes: int, budget: float) -> dict:
    """Threshold on validation at the false-alarm budget; recall and false alarms on test."""
    from trainkit.core.contract import screening_probability
    from trainkit.learning.steps import predict_proba
    from trainkit.metrics import recall_interval, threshold_for_false_alarms

    pv = screening_probability(
        predict_proba(model, np.asarray(val.images), num_classes=num_classes)
    )
    pt = screening_probability(
        predict_proba(model, np.asarray(test.images), num_classes=num_classes)
    )
    crack_v, crack_t = val.labels != 0, test.labels != 0
    thr = threshold_for_false_alarms(crack_v, pv, max_false_alarm_rate=budget)
    flagged = pt >= thr
    k, n = int((flagged & crack_t).sum()), int(crack_t.sum())
    fp, n_neg = int((flagged & ~crack_t).sum()), int((~crack_t).sum())
    ci = recall_interval(k, n, method="wilson")
    return {
        "recall": round(k / n, 4),
        "recall_k_n": [k, n],
        "recall_wilson95": [round(ci.low, 4), round(ci.high, 4)],
        "false_alarm_rate": round(fp / n_neg, 4),
        "false_alarm_k_n": [fp, n_neg],
        "threshold_from_validation": round(float(thr), 6),
    }


def recipes() -> dict:
    from trainkit.learning.config import TrainConfig, load_train_config

    default = load_train_config("default")
    return {
        "efficientnet_lite0 (ImageNet)": default,
        "mobilenet_v3_small (random init)": TrainConfig.model_validate(
            {
                **default.model_dump(),
                "backbone": "mobilenet_v3_small",
                "weights": None,
                "lr": 0.002,
                "backbone_lr_scale": 1.0,
                "freeze_bn_stats": False,
                "head_epochs": 0,
                "cached_features": False,
            }
        ),
    }


def main(argv: list[str]) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out", type=Path)
    ap.add_argument("--photos", type=int, default=160)
    ap.add_argument("--seed", type=int, default=7001)
    ap.add_argument("--cpu-seconds", type=float, default=100.0)
    ap.add_argument("--sizes", default="100,300,1000,3000")
    ap.add_argument("--budget", type=float, default=0.05, help="false-alarm budget")
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--json", type=Path, default=None)
    ap.add_argument(
        "--input-px", type=int, default=0, help="upscale patches to this size in the network"
    )
    ap.add_argument("--only", default=None, help="run only the networks whose name contains this")
    args = ap.parse_args(argv)

    import torch

    from trainkit.learning.data import load_patch_set

    torch.set_num_threads(args.threads)
    args.out.mkdir(parents=True, exist_ok=True)
    t_build = time.perf_counter()
    ws = build_workspace(args.out, args.photos, args.seed)
    cs = ws.class_set
    train_all = load_patch_set(ws, "train", cs)
    val, test = load_patch_set(ws, "val", cs), load_patch_set(ws, "test", cs)
    print(
        f"data: {len(train_all)} training, {len(val)} validation, {len(test)} test patches "
        f"({time.perf_counter() - t_build:.0f} s to build)",
        flush=True,
    )
    perm = np.random.default_rng(args.seed).permutation(len(train_all))
    sizes = [min(int(s), len(train_all)) for s in args.sizes.split(",")]
    rows = []
    for n in sizes:
        idx = np.sort(perm[:n])  # nested subsets: each size holds the smaller ones
        subset = train_all.take(idx)
        for name, cfg in recipes().items():
            if args.only and args.only not in name:
                continue
            run = train_in_budget(cfg, subset, cs, args.cpu_seconds, args.seed, args.input_px)
            run["input_px"] = args.input_px or ws.tile_px
            res = held_out_recall(run.pop("model"), val, test, cs.num_classes, args.budget)
            row = {"labelled_patches": n, "network": name, **run, **res}
            rows.append(row)
            print(json.dumps(row), flush=True)

    header = (
        f"{'labels':>6}  {'network':<34} {'recall@FA' + str(args.budget):>12}  "
        f"{'Wilson 95 %':<16} {'k/n':>9}  {'FA rate':>7}  {'epochs':>6}  {'CPU s':>6}"
    )
    print(header)
    for r in rows:
        lo, hi = r["recall_wilson95"]
        k, n = r["recall_k_n"]
        print(
            f"{r['labelled_patches']:>6}  {r['network']:<34} {r['recall']:>12.3f}  "
            f"[{lo:.3f}, {hi:.3f}]   {k:>4}/{n:<4}  {r['false_alarm_rate']:>7.3f}  "
            f"{r['epochs_equivalent']:>6}  {r['cpu_seconds']:>6}"
        )
    result = {
        "question": "held-out crack recall at a false-alarm budget vs number of labelled patches",
        "budget_cpu_seconds_per_point": args.cpu_seconds,
        "budget_clock": "time.process_time() of the training process (all threads)",
        "threads": args.threads,
        "false_alarm_budget": args.budget,
        "data": {
            "photos": ws.summary()["photos"],
            "training_patches_available": len(train_all),
            "validation_patches": len(val),
            "test_patches": len(test),
            "test_crack_patches": int((test.labels != 0).sum()),
        },
        "rows": rows,
    }
    target = args.json or args.out / "label_efficiency.json"
    from trainkit.core.fsutil import atomic_write_json

    atomic_write_json(target, result)
    print(f"saved {target}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
