"""The training loop: fine-tune a backbone on a workspace's split, with checkpoints and resume.

An experiment folder (see :mod:`trainkit.core.experiment`) receives ``recipe.yaml`` (the resolved recipe),
``experiment.json`` (which workspace and split it used), ``history.csv`` (one row
per epoch, with throughput in images per second), ``resume.pt`` (for resuming after
a crash) and ``checkpoint.pt`` (the epoch with the best validation score).
"""

from __future__ import annotations

import csv
import hashlib
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch
import yaml
from torch import nn

from trainkit.core.experiment import Experiment
from trainkit.core.fsutil import atomic_path, atomic_write_json, atomic_write_text
from trainkit.core.taxonomy import load_class_set
from trainkit.labels.splits import check_no_leak
from trainkit.learning.adapt import Adaptation, load_subset, replay_set
from trainkit.learning.config import TrainConfig
from trainkit.learning.data import Augmenter, load_patch_set
from trainkit.learning.models import backbone_record
from trainkit.learning.network import TrainingError, start_network
from trainkit.learning.steps import (
    class_weights,
    cpu_threads,
    epoch_seed,
    evaluate_split,
    frozen_features,
    head_module_name,
    lr_schedule,
    selection_score,
    set_stage,
    stage_of,
    train_head_on_features,
    train_one_epoch,
)
from trainkit.store.workspace import Workspace

__all__ = [
    "train",
    "TrainingError",
    "HISTORY_FIELDS",
    "RunState",
]

HISTORY_FIELDS = (
    "epoch",
    "stage",
    "lr",
    "train_loss",
    "train_accuracy",
    "val_loss",
    "val_accuracy",
    "val_balanced_accuracy",
    "val_crack_recall",
    "val_recall_at_fa",
    "train_images_per_s",
    "seconds",
)


def data_digest(
    workspace: Workspace,
    subsets: tuple[str, ...] = ("train", "val"),
    adaptation: Adaptation | None = None,
) -> str:
    """SHA-256 over the (photo, box, label) of the patches in the given subsets (and of the
    job cells an adaptation learns from, with the subset it gave them)."""
    role = {i: k for k, ids in (adaptation.cells if adaptation else {}).items() for i in ids}
    h = hashlib.sha256()
    for r in workspace.patches(labelled=True):
        subset = r.subset if r.subset in subsets else role.get(r.id)
        if subset is not None and r.label is not None:
            h.update(f"{r.photo}|{r.box}|{r.label}|{subset}\n".encode())
    if adaptation is not None:
        h.update(f"from {adaptation.source} replay {adaptation.replay}".encode())
    return h.hexdigest()


# ----- the run ------------------------------------------------------------------------


def _save_atomic(obj: dict, path: Path) -> None:
    with atomic_path(path) as tmp:
        torch.save(obj, tmp)


def native_bf16() -> bool:
    """Whether this CPU does bfloat16 arithmetic natively (oneDNN's own check)."""
    return bool(torch.ops.mkldnn._is_mkldnn_bf16_supported())


def _check_bf16(cfg: TrainConfig) -> None:
    if cfg.bf16 and not native_bf16():
        raise TrainingError(
            "bf16: this CPU has no native bfloat16 arithmetic (AVX512-BF16 or AMX), so autocast "
            "would emulate it and run several times slower (measured in benchmarks/run.py); "
            "set bf16: false"
        )


@dataclass
class RunState:
    """What a run carries from epoch to epoch (and what ``resume.pt`` saves)."""

    start_epoch: int = 1
    step: int = 0
    history: list[dict] = field(default_factory=list)
    best: dict = field(
        default_factory=lambda: {"score": None, "epoch": 0, "state": None, "row": None}
    )
    patience_left: int = 0
    stopped_early: bool = False


def prepare_data(
    workspace: Workspace, cfg: TrainConfig, adaptation: Adaptation | None = None
) -> tuple:
    """Check the workspace against the recipe and load (class set, train set, val set, records).

    With an ``adaptation`` the training set is the job's training cells plus a replayed
    share of the split's training patches, the validation set the split's plus the job's.
    """
    class_set = load_class_set(cfg.class_set)
    ws_classes = workspace.class_set
    if ws_classes.names != class_set.names:
        raise TrainingError(
            f"config class set {cfg.class_set!r} {list(class_set.names)} differs from the workspace's "
            f"{list(ws_classes.names)}"
        )
    records = workspace.patches(labelled=True)
    check_no_leak(records)
    if not any(r.subset for r in records):
        raise TrainingError(
            f"workspace {workspace.root} has no split; run `trainkit split {workspace.root}` first"
        )
    train_set = load_patch_set(workspace, "train", class_set)
    val_set = load_patch_set(workspace, "val", class_set)
    if adaptation is not None:
        experiment = {"adaptation": adaptation.to_dict()}
        job_train = load_patch_set(
            workspace, "job-train", class_set, ids=set(adaptation.cells["train"])
        )
        train_set = replay_set(train_set, job_train, adaptation.replay, cfg.seed)
        val_set = load_subset(workspace, "val", class_set, experiment)
    if len(train_set) < 2:
        raise TrainingError(
            f"only {len(train_set)} labelled training patches; label more before training"
        )
    return class_set, train_set, val_set, records


def build_optimizer(model: nn.Module, cfg: TrainConfig) -> torch.optim.AdamW:
    """AdamW with two groups: the head at ``lr``, the backbone at ``lr * backbone_lr_scale``.

    Each group's ``lr_scale`` multiplies the scheduled rate at every step (see :func:`_fit`).
    """
    head = head_module_name(cfg.backbone) + "."
    head_params = [p for n, p in model.named_parameters() if n.startswith(head)]
    body_params = [p for n, p in model.named_parameters() if not n.startswith(head)]
    return torch.optim.AdamW(
        [
            {"params": body_params, "lr_scale": cfg.backbone_lr_scale},
            {"params": head_params, "lr_scale": 1.0},
        ],
        lr=cfg.lr,
        weight_decay=cfg.weight_decay,
    )


def write_provenance(
    folder: Experiment,
    workspace: Workspace,
    cfg: TrainConfig,
    records,
    sets: tuple,
    class_set,
    adaptation: Adaptation | None = None,
) -> dict:
    """Write recipe.yaml and experiment.json (which data the run used); returns the latter."""
    train_set, val_set = sets
    atomic_write_text(
        folder.recipe_path, yaml.safe_dump(cfg.model_dump(mode="json"), sort_keys=False)
    )
    gsds = [r.gsd_mm for r in records if r.subset == "train" and r.gsd_mm is not None]
    mms = [r.patch_mm for r in records if r.subset == "train" and r.patch_mm is not None]
    experiment = {
        "workspace": str(Path(workspace.root).resolve()),
        "class_set": class_set.to_dict(),
        "input_px": workspace.tile_px,
        "split": workspace.split_info(),
        "training_patches": len(train_set),
        "validation_patches": len(val_set),
        "data_digest": data_digest(workspace, adaptation=adaptation),
        "gsd_mm_range": [min(gsds), max(gsds)] if gsds else None,
        "patch_mm_range": [min(mms), max(mms)] if mms else None,
    }
    if adaptation is not None:
        experiment["adaptation"] = adaptation.to_dict()
    atomic_write_json(folder.provenance_path, experiment)
    return experiment


def try_resume(
    path: Path, model: nn.Module, optimizer, cfg: TrainConfig, digest: str, note
) -> RunState:
    """The state to continue from: ``resume.pt`` when it matches the recipe and data, else a fresh start.

    Early stopping counts full-network epochs only, so a fresh run starts with the whole patience.
    """
    fresh = RunState(patience_left=cfg.early_stop_patience)
    if not path.exists():
        return fresh
    try:
        saved = torch.load(path, map_location="cpu", weights_only=True)
    except Exception:  # a damaged resume.pt (e.g. disk full): start over rather than fail
        saved = {}
    if not (
        saved.get("format") == "trainkit-last-3"
        and saved.get("config") == cfg.model_dump(mode="json")
        and saved.get("data_digest") == digest
    ):
        note(
            f"{path} cannot be resumed (another config, data set or kit version, "
            "or a damaged file); starting from epoch 1"
        )
        return fresh
    model.load_state_dict(saved["model"])
    optimizer.load_state_dict(saved["optimizer"])
    state = RunState(
        start_epoch=saved["epoch"] + 1,
        step=saved["step"],
        history=saved["history"],
        best=saved["best"],
        patience_left=int(saved["patience_left"]),
        stopped_early=bool(saved["stopped_early"]),
    )
    if state.stopped_early:
        state.start_epoch = cfg.epochs + 1  # the run had ended: rewrite its checkpoint only
        note(f"{path} is a run that stopped early at epoch {saved['epoch']}")
    elif state.start_epoch > cfg.epochs:
        note(
            f"{path} is a finished run of {saved['epoch']} epochs "
            "(--restart trains again from epoch 1)"
        )
    else:
        note(f"resuming after epoch {saved['epoch']} from {path}")
    return state


class _HeadCache:
    """Frozen-backbone features of the training and validation patches, computed once."""

    def __init__(self) -> None:
        self.features = self.labels = self.val_features = None

    def clear(self) -> None:
        self.features = self.labels = self.val_features = None


def run_epoch(
    model: nn.Module,
    forward,
    epoch: int,
    cfg: TrainConfig,
    *,
    sets: tuple,
    augment: Augmenter,
    optimizer,
    loss_fn: nn.Module,
    lr_at: Callable[[int], float],
    step: int,
    cache: _HeadCache,
    on_batch,
    note,
) -> tuple[dict, int]:
    """Train one epoch of its stage, then score validation; returns the history row and next step."""
    train_set, val_set = sets
    stage = stage_of(epoch, cfg)
    seed = epoch_seed(cfg.seed, epoch)
    rng = np.random.default_rng(seed)
    torch.manual_seed(seed)
    augment.reseed(seed)
    set_stage(model, cfg.backbone, stage, freeze_bn_stats=cfg.freeze_bn_stats)
    common = dict(optimizer=optimizer, loss_fn=loss_fn, cfg=cfg, rng=rng, lr_at=lr_at, step=step)
    val_probs = None
    if stage == "head" and cfg.cached_features:
        if cache.features is None:
            note(
                f"computing frozen backbone features once: {len(train_set)} patches x "
                f"{len(augment.elements)} symmetries"
            )
            cache.features = frozen_features(model, cfg.backbone, train_set, augment.elements)
            cache.labels = np.stack([augment.perms[e][train_set.labels] for e in augment.elements])
        head = model.get_submodule(head_module_name(cfg.backbone))
        stats, step = train_head_on_features(
            head, cache.features, cache.labels, on_batch=on_batch, **common
        )
        if len(val_set):  # the frozen backbone gives the same head inputs every epoch
            if cache.val_features is None:
                cache.val_features = frozen_features(model, cfg.backbone, val_set, [(0, False)])[0]
            with torch.no_grad():
                val_probs = torch.softmax(head.eval()(cache.val_features), dim=1).numpy()
    else:
        cache.clear()  # free the caches once the whole network trains
        stats, step = train_one_epoch(
            model, train_set, augment=augment, forward=forward, on_batch=on_batch, **common
        )
    val = evaluate_split(
        model,
        val_set,
        nn.NLLLoss(),
        augment.class_set.num_classes,
        false_alarm_budget=cfg.false_alarm_budget,
        probs=val_probs,
    )
    return {"epoch": epoch, "stage": stage, **stats, **val}, step


def update_best(state: RunState, row: dict, model: nn.Module, cfg: TrainConfig, has_val: bool):
    """Keep the best epoch's weights and count down the early-stopping patience."""
    score = selection_score(row, cfg, has_val)
    improved = state.best["score"] is None or score > state.best["score"]
    if improved:
        state.best = {
            "score": score,
            "epoch": row["epoch"],
            "state": {k: v.clone() for k, v in model.state_dict().items()},
            "row": row,
        }
    if row["stage"] == "head" or row["epoch"] == cfg.head_epochs + 1 or improved:
        state.patience_left = cfg.early_stop_patience
    else:
        state.patience_left -= 1
    state.stopped_early = bool(cfg.early_stop_patience) and state.patience_left <= 0


def save_resume_point(path: Path, state: RunState, model, optimizer, cfg, digest: str) -> None:
    """Everything needed to continue exactly after this epoch (``resume.pt``)."""
    _save_atomic(
        {
            "format": "trainkit-last-3",
            "model": model.state_dict(),
            "optimizer": optimizer.state_dict(),
            "epoch": state.history[-1]["epoch"],
            "step": state.step,
            "history": state.history,
            "best": state.best,
            "patience_left": state.patience_left,
            "stopped_early": state.stopped_early,
            "config": cfg.model_dump(mode="json"),
            "data_digest": digest,
        },
        path,
    )


def train(
    workspace: Workspace,
    exp_dir: str | Path,
    cfg: TrainConfig,
    *,
    resume: bool = True,
    on_epoch: Callable[[dict], None] | None = None,
    on_batch: Callable[[int], None] | None = None,
    on_start: Callable[[int, int], None] | None = None,
    on_note: Callable[[str], None] | None = None,
    adaptation: Adaptation | None = None,
) -> dict:
    """Train on the workspace's train subset, select on val, write the experiment folder.

    Args:
        workspace: the workspace with labels and a split.
        exp_dir: experiment folder (created).
        cfg: the resolved training config.
        resume: continue from ``resume.pt`` if it exists and matches the config and data.
        on_epoch: called with each history row.
        on_batch: called with the batch size after every optimiser step.
        on_start: called with (epochs still to run, training patches per epoch) before training.
        on_note: called with a line of text about slow preparation steps.
        adaptation: start from this adaptation's source checkpoint and learn from its job
            cells too (:mod:`trainkit.learning.adapt`; ``cfg`` from ``adapt_recipe``).

    Returns:
        A summary: best epoch and its validation scores, paths, throughput, weights used.
    """
    note = on_note or (lambda _msg: None)
    folder = Experiment(exp_dir)
    folder.path.mkdir(parents=True, exist_ok=True)
    folder.migrate()  # folders from before the rename keep resuming
    _check_bf16(cfg)
    if cfg.cascade is not None:  # a first stage that cannot be built fails now, not after training
        from trainkit.learning.cascade import build_stage1

        build_stage1(cfg.cascade, workspace.tile_px, load_weights=False)
    torch.set_num_threads(cfg.threads or cpu_threads())
    torch.manual_seed(cfg.seed)

    # 1) data
    class_set, train_set, val_set, records = prepare_data(workspace, cfg, adaptation)
    sets = (train_set, val_set)
    experiment = write_provenance(folder, workspace, cfg, records, sets, class_set, adaptation)

    # 2) network (with the weights it starts from), loss, optimiser, schedule
    if adaptation is None:
        model, weights = start_network(cfg, class_set.num_classes)
    else:
        model, weights = _adaptation_start(adaptation, cfg, class_set)
    if cfg.weights is None and cfg.head_epochs:
        note(
            "note: head_epochs with weights: null trains a head on a randomly initialised "
            "backbone; it is meant for pretrained weights"
        )
    optimizer = build_optimizer(model, cfg)
    loss_fn = nn.CrossEntropyLoss(
        weight=class_weights(train_set.labels, class_set.num_classes, cfg.class_weighting),
        label_smoothing=cfg.label_smoothing,
    )
    augment = Augmenter(class_set, cfg.augment, seed=cfg.seed)
    steps_per_epoch = max(
        1, len(train_set) // cfg.batch_size + (len(train_set) % cfg.batch_size >= 2)
    )
    lr_at = lr_schedule(cfg, steps_per_epoch)
    forward = torch.compile(model) if cfg.compile else model

    # 3) resume where an interrupted run stopped
    digest = experiment["data_digest"]
    state = (
        try_resume(folder.resume_path, model, optimizer, cfg, digest, note)
        if resume
        else RunState(patience_left=cfg.early_stop_patience)
    )
    if on_start:  # the epochs still to run (all of them unless resuming)
        on_start(max(0, cfg.epochs - state.start_epoch + 1), len(train_set))

    # 4) the loop: one epoch of its stage, validation, keep the best, save a resume point
    cache = _HeadCache()
    cv2_threads = _cv2_threads(1)  # augmentation runs beside torch's threads: keep OpenCV to one
    try:
        for epoch in range(state.start_epoch, cfg.epochs + 1):
            row, state.step = run_epoch(
                model,
                forward,
                epoch,
                cfg,
                sets=sets,
                augment=augment,
                optimizer=optimizer,
                loss_fn=loss_fn,
                lr_at=lr_at,
                step=state.step,
                cache=cache,
                on_batch=on_batch,
                note=note,
            )
            state.history.append(row)
            update_best(state, row, model, cfg, has_val=len(val_set) > 0)
            _write_history(folder.history_path, state.history)
            save_resume_point(folder.resume_path, state, model, optimizer, cfg, digest)
            if on_epoch:
                on_epoch(row)
            if state.stopped_early:
                break
    finally:
        _cv2_threads(cv2_threads)

    # 5) the cascade's first stage, distilled from the selected epoch (when the recipe asks)
    cascade = None
    if cfg.cascade is not None:
        from trainkit.learning.cascade import train_stage1

        model.load_state_dict(state.best["state"])
        cascade = train_stage1(
            model, train_set.images, train_set.labels, cfg.cascade,
            num_classes=class_set.num_classes, seed=cfg.seed, note=note,
        )  # fmt: skip

    # 6) the selected checkpoint
    return save_checkpoint(
        folder, state, cfg, class_set, experiment, weights, len(val_set) > 0, cascade=cascade
    )


def save_checkpoint(
    folder: Experiment,
    state: RunState,
    cfg: TrainConfig,
    class_set,
    experiment: dict,
    weights: dict,
    has_val: bool,
    *,
    cascade: dict | None = None,
) -> dict:
    """Write ``checkpoint.pt`` (the selected epoch, and the cascade's first stage when one was
    trained) and return the run's summary."""
    record = backbone_record(cfg.backbone)
    checkpoint = {
        "format": "trainkit-checkpoint-1",
        "model": state.best["state"],
        "config": cfg.model_dump(mode="json"),
        "class_set": class_set.to_dict(),
        "input_px": experiment["input_px"],
        "weights": weights,
        "preprocess": {"mean": list(record.mean), "std": list(record.std)},
        "best_epoch": state.best["epoch"],
        "best_val": state.best["row"],
        "selected_on": cfg.select_on if has_val else "train_loss",
        "experiment": experiment,
    }
    if cascade is not None:
        checkpoint["cascade"] = cascade
    _save_atomic(checkpoint, folder.checkpoint_path)
    ips = [h["train_images_per_s"] for h in state.history if h["train_images_per_s"] > 0]
    return {
        "experiment": str(folder.path),
        "epochs_run": len(state.history),
        "best_epoch": state.best["epoch"],
        "best_val": state.best["row"],
        "median_images_per_second": float(np.median(ips)) if ips else 0.0,
        "training_patches": experiment["training_patches"],
        "validation_patches": experiment["validation_patches"],
        "weights": weights,
        "cascade_seconds": None if cascade is None else cascade["seconds"],
    }


def _adaptation_start(adaptation: Adaptation, cfg: TrainConfig, class_set) -> tuple:
    """The source experiment's selected network and the record of the weights it holds."""
    from trainkit.learning.network import load_checkpoint

    model, ckpt, source_classes = load_checkpoint(adaptation.source)
    if source_classes.names != class_set.names or ckpt["config"]["backbone"] != cfg.backbone:
        raise TrainingError(
            f"experiment {adaptation.source} has backbone {ckpt['config']['backbone']!r} and "
            f"classes {list(source_classes.names)}; this run asks for {cfg.backbone!r} and "
            f"{list(class_set.names)}"
        )
    started = ckpt.get("weights") or {"name": "not recorded"}
    weights = {
        "name": f"{started.get('name')}, then trained in {adaptation.source} (epoch "
        f"{ckpt['best_epoch']})",
        **{k: v for k, v in started.items() if k != "name"},
        "adapted_from": adaptation.source,
    }
    return model.train(), weights


def _cv2_threads(n: int) -> int:
    """Set OpenCV's thread count; returns the previous one."""
    import cv2

    old = cv2.getNumThreads()
    cv2.setNumThreads(n)
    return old


def _write_history(path: Path, history: list[dict]) -> None:
    with atomic_path(path) as tmp:
        with tmp.open("w", newline="", encoding="utf-8") as fh:
            w = csv.DictWriter(fh, fieldnames=HISTORY_FIELDS, extrasaction="ignore")
            w.writeheader()
            for row in history:
                w.writerow({k: (f"{v:.6g}" if isinstance(v, float) else v) for k, v in row.items()})
