"""The training loop: exact resume, head-only stage, cached features, sampling, selection, cache.

Outside references: scikit-learn's ``roc_curve`` for the recall at a false-alarm budget,
scipy's chi-square goodness-of-fit test for class-balanced sampling, and PyTorch itself
(a forward pass computed by hand) for the cached head inputs.
"""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest
import torch
from scipy import stats
from sklearn.metrics import roc_curve

from trainkit.learning.config import ConfigError, load_train_config
from trainkit.learning.network import TrainingError, build_network
from trainkit.learning.steps import (
    cpu_threads,
    epoch_order,
    frozen_features,
    head_module_name,
    selection_score,
)
from trainkit.learning.training import train
from trainkit.metrics import recall_at_false_alarm
from trainkit.store.workspace import Workspace

# history columns that measure time, not the computation
_TIMING = {"train_images_per_s", "seconds"}


def _rows(path):
    return [
        {k: v for k, v in r.items() if k not in _TIMING}
        for r in csv.DictReader((path / "history.csv").open())
    ]


def _state(path, name="resume.pt"):
    return torch.load(path / name, weights_only=True)["model"]


@pytest.fixture()
def ws(demo_run):
    out, _ = demo_run
    return Workspace.open(out / "workspace")


# ----- resume ------------------------------------------------------------------------


class _Crash(RuntimeError):
    pass


def test_resume_after_a_crash_gives_the_same_weights_as_an_uninterrupted_run(ws, tmp_path):
    """Kill after epoch 2 of 3, resume: weights, optimiser-driven history and choice all match."""
    cfg = load_train_config("scratch", {"epochs": 3, "threads": 1, "seed": 11})
    train(ws, tmp_path / "whole", cfg, resume=False)

    def crash_after_two(row):
        if row["epoch"] == 2:
            raise _Crash

    with pytest.raises(_Crash):
        train(ws, tmp_path / "cut", cfg, resume=False, on_epoch=crash_after_two)
    assert len(_rows(tmp_path / "cut")) == 2
    notes = []
    train(ws, tmp_path / "cut", cfg, resume=True, on_note=notes.append)
    assert any("resuming after epoch 2" in n for n in notes)

    a, b = _state(tmp_path / "whole"), _state(tmp_path / "cut")
    assert all(torch.equal(a[k], b[k]) for k in a)
    assert _rows(tmp_path / "whole") == _rows(tmp_path / "cut")
    ca = torch.load(tmp_path / "whole" / "checkpoint.pt", weights_only=True)
    cb = torch.load(tmp_path / "cut" / "checkpoint.pt", weights_only=True)
    assert ca["best_epoch"] == cb["best_epoch"]
    assert all(torch.equal(ca["model"][k], cb["model"][k]) for k in ca["model"])


def test_resume_is_exact_with_a_head_stage_cached_features_and_patience(ws, tmp_path):
    cfg = load_train_config(
        "scratch",
        {
            "epochs": 4,
            "head_epochs": 2,
            "cached_features": True,
            "early_stop_patience": 3,
            "threads": 1,
            "seed": 8,
        },
    )
    train(ws, tmp_path / "whole", cfg, resume=False)

    def crash_after(epoch):
        def hook(row):
            if row["epoch"] == epoch:
                raise _Crash

        return hook

    with pytest.raises(_Crash):  # inside the head stage, on cached features
        train(ws, tmp_path / "cut", cfg, resume=False, on_epoch=crash_after(1))
    with pytest.raises(_Crash):  # right after unfreezing
        train(ws, tmp_path / "cut", cfg, resume=True, on_epoch=crash_after(3))
    train(ws, tmp_path / "cut", cfg, resume=True)
    a, b = _state(tmp_path / "whole"), _state(tmp_path / "cut")
    assert all(torch.equal(a[k], b[k]) for k in a)
    assert _rows(tmp_path / "whole") == _rows(tmp_path / "cut")


def test_early_stopping_counts_full_epochs_only_and_survives_resume(ws, tmp_path, monkeypatch):
    """With a score that never improves, patience 2 and one head epoch: the head epoch and
    the first full epoch reset the patience, so the run stops after epoch 4, and resuming
    a stopped run trains nothing more."""
    from trainkit.learning import training as tr

    monkeypatch.setattr(tr, "selection_score", lambda row, cfg, has_val: [0.0])
    cfg = load_train_config(
        "scratch", {"epochs": 8, "head_epochs": 1, "early_stop_patience": 2, "threads": 1}
    )
    train(ws, tmp_path / "s", cfg, resume=False)
    rows = list(csv.DictReader((tmp_path / "s" / "history.csv").open()))
    assert [r["stage"] for r in rows] == ["head", "full", "full", "full"]
    notes = []
    train(ws, tmp_path / "s", cfg, resume=True, on_note=notes.append)
    assert len(list(csv.DictReader((tmp_path / "s" / "history.csv").open()))) == 4
    assert any("stopped early at epoch 4" in n for n in notes)


def test_prefetch_thread_changes_nothing_but_speed(ws, tmp_path):
    base = {"epochs": 1, "threads": 1, "seed": 5}
    for name, prefetch in (("on", True), ("off", False)):
        cfg = load_train_config("scratch", {**base, "prefetch": prefetch})
        train(ws, tmp_path / name, cfg, resume=False)
    a, b = _state(tmp_path / "on"), _state(tmp_path / "off")
    assert all(torch.equal(a[k], b[k]) for k in a)


# ----- head-only stage and cached features --------------------------------------------


def _fresh_network(cfg, num_classes=6):
    torch.manual_seed(cfg.seed)
    return build_network(cfg, num_classes)


def test_head_stage_changes_only_the_head(ws, tmp_path):
    cfg = load_train_config("scratch", {"epochs": 1, "head_epochs": 1, "threads": 1, "seed": 2})
    train(ws, tmp_path / "h", cfg, resume=False)
    after = _state(tmp_path / "h")
    before = _fresh_network(cfg).state_dict()
    head = head_module_name(cfg.backbone) + "."
    changed = {k for k in before if not torch.equal(before[k], after[k])}
    assert changed, "the head did not train"
    # Frozen backbone: weights and BatchNorm running statistics untouched.
    assert all(k.startswith(head) for k in changed), sorted(changed)[:5]
    rows = list(csv.DictReader((tmp_path / "h" / "history.csv").open()))
    assert rows[0]["stage"] == "head"


def test_head_then_full_stage_order(ws, tmp_path):
    cfg = load_train_config("scratch", {"epochs": 2, "head_epochs": 1, "threads": 1})
    train(ws, tmp_path / "hf", cfg, resume=False)
    rows = list(csv.DictReader((tmp_path / "hf" / "history.csv").open()))
    assert [r["stage"] for r in rows] == ["head", "full"]


def test_each_stage_has_its_own_warm_up_and_cosine():
    """lr_schedule against get_lr's documented shape, restarted at the unfreeze."""
    from trainkit.learning.steps import get_lr, lr_schedule

    cfg = load_train_config("default", {"epochs": 10, "head_epochs": 4, "warmup_epochs": 1})
    lr = lr_schedule(cfg, steps_per_epoch=10)
    head_steps, full_steps = 40, 60
    assert lr(0) == pytest.approx(cfg.lr / 10)  # warm-up step 1 of 10
    assert lr(9) == pytest.approx(cfg.lr)  # warm-up done: the peak
    assert lr(head_steps - 1) < 0.05 * cfg.lr  # the head stage has decayed
    assert lr(head_steps) == pytest.approx(cfg.lr / 10)  # unfreeze: warm-up again
    assert lr(head_steps + 9) == pytest.approx(cfg.lr)
    mid = head_steps + 10 + (full_steps - 10) // 2
    assert lr(mid) == pytest.approx(
        get_lr(mid - head_steps, total_steps=full_steps, warmup_steps=10, peak_lr=cfg.lr)
    )
    # Cosine half-way between peak and 1 % floor: (1 + 0.01) / 2 of the peak.
    assert lr(mid) == pytest.approx(cfg.lr * 0.505, rel=1e-6)


def test_frozen_features_are_the_head_inputs(ws):
    """The hook-captured features equal the tiny CNN's pooled features computed by hand."""
    from trainkit.core.taxonomy import load_class_set
    from trainkit.learning.data import load_patch_set

    cfg = load_train_config("scratch", {"seed": 1})
    net = _fresh_network(cfg).eval()
    data = load_patch_set(ws, "val", load_class_set("orientation"))
    feats = frozen_features(net, cfg.backbone, data, [(0, False), (1, True)])
    assert feats.shape[:2] == (2, len(data))
    with torch.no_grad():
        x = torch.from_numpy(np.ascontiguousarray(data.images))
        body = net[1]
        by_hand = body.pool(body.features(net[0](x)))
        rotated = np.ascontiguousarray(np.rot90(data.images, 1, axes=(1, 2))[:, :, ::-1])
        by_hand_rot = body.pool(body.features(net[0](torch.from_numpy(rotated))))
    torch.testing.assert_close(feats[0], by_hand, rtol=1e-5, atol=1e-5)
    # apply_d4(k=1, flip=True) is rot90 then a left-right mirror (taxonomy's definition).
    from trainkit.core.taxonomy import apply_d4

    assert np.array_equal(apply_d4(data.images[0], 1, True), rotated[0])
    torch.testing.assert_close(feats[1], by_hand_rot, rtol=1e-5, atol=1e-5)


def test_cached_feature_run_trains_the_head_and_keeps_the_backbone(ws, tmp_path):
    cfg = load_train_config(
        "scratch",
        {"epochs": 3, "head_epochs": 3, "cached_features": True, "threads": 1, "seed": 4},
    )
    notes = []
    train(ws, tmp_path / "c", cfg, resume=False, on_note=notes.append)
    assert any("computing frozen backbone features once" in n for n in notes)
    after = _state(tmp_path / "c")
    before = _fresh_network(cfg).state_dict()
    head = head_module_name(cfg.backbone) + "."
    changed = {k for k in before if not torch.equal(before[k], after[k])}
    assert changed and all(k.startswith(head) for k in changed)
    rows = list(csv.DictReader((tmp_path / "c" / "history.csv").open()))
    assert len(rows) == 3 and all(r["stage"] == "head" for r in rows)
    # Learning happened: the training loss fell from the first to the last epoch.
    assert float(rows[-1]["train_loss"]) < float(rows[0]["train_loss"])
    # Validation in that stage runs the head on cached inputs: the same figures as the
    # whole network gives for the chosen epoch's weights.
    from torch import nn

    from trainkit.core.taxonomy import load_class_set
    from trainkit.learning.data import load_patch_set
    from trainkit.learning.network import load_checkpoint
    from trainkit.learning.steps import evaluate_split

    model, ckpt, _ = load_checkpoint(tmp_path / "c")
    val = load_patch_set(ws, "val", load_class_set("orientation"))
    direct = evaluate_split(model, val, nn.NLLLoss(), 6)
    logged = rows[ckpt["best_epoch"] - 1]
    for k, v in direct.items():
        assert float(logged[k]) == pytest.approx(v, rel=1e-4, abs=1e-5), k


# ----- sampling and selection ----------------------------------------------------------


def test_balanced_sampling_draws_classes_equally():
    """Chi-square goodness of fit (scipy.stats.chisquare) against equal class frequencies."""
    labels = np.array([0] * 900 + [1] * 60 + [2] * 30 + [3] * 10)
    rng = np.random.default_rng(0)
    drawn = np.concatenate([labels[epoch_order(labels, rng, "balanced")] for _ in range(20)])
    counts = np.bincount(drawn, minlength=4)
    assert stats.chisquare(counts).pvalue > 1e-3, counts
    # The shuffle order is a permutation: each patch once.
    perm = epoch_order(labels, rng, "shuffle")
    assert sorted(perm.tolist()) == list(range(len(labels)))


@pytest.mark.parametrize("seed", range(25))
def test_recall_at_false_alarm_matches_sklearn_roc_curve(seed):
    """Best TPR with FPR <= budget on scikit-learn's ROC curve (ties included)."""
    rng = np.random.default_rng(seed)
    n = int(rng.integers(5, 80))
    y = rng.random(n) < rng.uniform(0.2, 0.8)
    if y.all() or not y.any():
        y[0], y[-1] = True, False
    p = np.round(rng.random(n) * y * 0.5 + rng.random(n) * 0.5, int(rng.integers(1, 3)))
    budget = float(rng.choice([0.0, 0.05, 0.1, 0.25, 0.5]))
    fpr, tpr, _ = roc_curve(y, p)
    expected = float(tpr[fpr <= budget + 1e-12].max())
    assert recall_at_false_alarm(y, p, budget=budget) == pytest.approx(expected, abs=1e-12)


def test_recall_at_false_alarm_without_cracks_is_nan():
    assert math.isnan(recall_at_false_alarm([0, 0], [0.1, 0.2], budget=0.05))


def test_selection_key_follows_the_configured_metric():
    a = {"val_recall_at_fa": 0.9, "val_balanced_accuracy": 0.6, "val_loss": 1.0, "train_loss": 1.0}
    b = {"val_recall_at_fa": 0.8, "val_balanced_accuracy": 0.7, "val_loss": 1.0, "train_loss": 1.0}
    at_fa = load_train_config("default")
    macro = load_train_config("default", {"select_on": "macro_recall"})
    assert selection_score(a, at_fa, True) > selection_score(b, at_fa, True)
    assert selection_score(b, macro, True) > selection_score(a, macro, True)
    nan_row = {**a, "val_recall_at_fa": float("nan")}
    assert selection_score(nan_row, at_fa, True) < selection_score(b, at_fa, True)


# ----- patch cache -----------------------------------------------------------------------


def test_labelled_crops_are_cut_once_then_read_from_the_crop_store(ws, monkeypatch):
    from trainkit.core.taxonomy import load_class_set
    from trainkit.learning import data as data_mod
    from trainkit.store import pixels as pixels_mod

    cs = load_class_set("orientation")
    fresh = data_mod.load_patch_set(ws, "val", cs, cache=False)
    first = data_mod.load_patch_set(ws, "val", cs)  # cuts and stores what is not stored
    assert np.array_equal(first.images, fresh.images) and len(first) > 0

    def no_decoding(*_a, **_k):
        raise AssertionError("decoded a photo although the crops were stored")

    monkeypatch.setattr(pixels_mod, "read_checked_photo", no_decoding)
    again = data_mod.load_patch_set(ws, "val", cs)
    assert np.array_equal(again.images, fresh.images)
    assert list(again.patch_ids) == list(fresh.patch_ids)


# ----- settings ----------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("overrides", "needle"),
    [
        ({"head_epochs": 30, "epochs": 5}, "head_epochs (30) cannot exceed epochs (5)"),
        ({"cached_features": True, "head_epochs": 0}, "cached_features trains the head"),
        ({"sampling": "balanced"}, "set class_weighting: none"),
        ({"false_alarm_budget": 1.5}, "false_alarm_budget"),
    ],
)
def test_inconsistent_settings_give_one_line(overrides, needle):
    with pytest.raises(ConfigError) as err:
        load_train_config("default", overrides)
    msg = str(err.value)
    assert needle in msg and len(msg.splitlines()) == 1


def test_bf16_is_refused_on_a_cpu_without_it_and_allowed_with_it(ws, tmp_path, monkeypatch):
    """The refusal follows the CPU check, whatever CPU runs the test."""
    from trainkit.learning import training as tr

    cfg = load_train_config("scratch", {"epochs": 1, "bf16": True})
    monkeypatch.setattr(tr, "native_bf16", lambda: False)
    with pytest.raises(TrainingError, match="no native bfloat16"):
        train(ws, tmp_path / "bf", cfg)
    assert not (tmp_path / "bf" / "history.csv").exists()  # refused before any training
    monkeypatch.setattr(tr, "native_bf16", lambda: True)
    tr._check_bf16(cfg)  # accepted: no error


def test_thread_budget_follows_the_environment_and_affinity(monkeypatch):
    import os

    monkeypatch.setenv("OMP_NUM_THREADS", "3")
    assert cpu_threads() == 3
    monkeypatch.delenv("OMP_NUM_THREADS")
    assert cpu_threads() == len(os.sched_getaffinity(0))


def test_frozen_recipe_keeps_the_pretrained_backbone(ws, tmp_path):
    """The built-in 'frozen' recipe with a weights file: every backbone tensor equals the file's."""
    from trainkit.learning.models import create_model

    torch.manual_seed(9)
    pretrained = create_model("mobilenet_v3_small", 1000).state_dict()
    wfile = tmp_path / "backbone.pth"
    torch.save(pretrained, wfile)
    cfg = load_train_config(
        "frozen", {"weights": str(wfile), "epochs": 2, "head_epochs": 2, "threads": 1}
    )
    train(ws, tmp_path / "f", cfg, resume=False)
    after = _state(tmp_path / "f", "checkpoint.pt")
    head = head_module_name(cfg.backbone) + "."
    for k, v in pretrained.items():
        if not ("1." + k).startswith(head):
            assert torch.equal(after["1." + k], v), k


# ----- fine-tuning settings: BatchNorm statistics and the backbone learning rate ----------


def test_frozen_bn_stats_keep_the_running_statistics_and_train_the_affine_parameters():
    """freeze_bn_stats: backbone BatchNorm normalises with its stored statistics (torch's
    F.batch_norm with training=False is the reference) and does not update them, while
    its scale and shift still receive gradients."""
    import torch.nn.functional as F
    from torch import nn

    from trainkit.learning.steps import set_stage

    cfg = load_train_config("scratch", {"seed": 3})
    net = _fresh_network(cfg)
    bn = next(m for m in net[1].features if isinstance(m, nn.BatchNorm2d))
    with torch.no_grad():
        bn.running_mean.uniform_(-0.5, 0.5)
        bn.running_var.uniform_(0.5, 2.0)
    mean0, var0 = bn.running_mean.clone(), bn.running_var.clone()
    x = torch.randint(0, 256, (4, 32, 32, 3), dtype=torch.uint8)
    set_stage(net, cfg.backbone, "full", freeze_bn_stats=True)
    captured = {}
    # clone: the ReLU after it works in place
    hook = bn.register_forward_hook(lambda m, i, o: captured.update(inp=i[0], out=o.clone()))
    net(x).sum().backward()
    hook.remove()
    assert torch.equal(bn.running_mean, mean0) and torch.equal(bn.running_var, var0)
    ref = F.batch_norm(captured["inp"], mean0, var0, bn.weight, bn.bias, training=False, eps=bn.eps)
    torch.testing.assert_close(captured["out"], ref)
    assert bn.weight.grad is not None and bn.weight.requires_grad
    # Without the setting the statistics move in the full stage (torch's training-mode BN).
    set_stage(net, cfg.backbone, "full", freeze_bn_stats=False)
    net(x)
    assert not torch.equal(bn.running_mean, mean0)


def test_backbone_learning_rate_is_a_fraction_of_the_heads():
    from torch import nn

    from trainkit.learning.steps import _fit
    from trainkit.learning.training import build_optimizer

    cfg = load_train_config("scratch", {"backbone_lr_scale": 0.1, "seed": 0})
    net = _fresh_network(cfg)
    opt = build_optimizer(net, cfg)
    head = head_module_name(cfg.backbone) + "."
    head_ids = {id(p) for n, p in net.named_parameters() if n.startswith(head)}
    body_group, head_group = opt.param_groups
    assert {id(p) for p in head_group["params"]} == head_ids
    assert len(body_group["params"]) + len(head_ids) == len(list(net.parameters()))
    x = torch.randint(0, 256, (4, 32, 32, 3), dtype=torch.uint8)
    y = torch.tensor([0, 1, 2, 3])
    net.train()
    _fit([(x, y)], net, optimizer=opt, loss_fn=nn.CrossEntropyLoss(), lr_at=lambda s: 0.02, step=0)
    assert head_group["lr"] == pytest.approx(0.02)
    assert body_group["lr"] == pytest.approx(0.002)


def test_backbone_lr_scale_outside_its_range_is_one_config_error():
    with pytest.raises(ConfigError, match="backbone_lr_scale") as err:
        load_train_config("scratch", {"backbone_lr_scale": 1.5})
    assert len(str(err.value).splitlines()) == 1


def test_the_weights_file_is_read_and_hashed_once(ws, tmp_path, monkeypatch):
    """Training from a weights file reads it once and hashes it once; the digest it records
    is the file's SHA-256 (Python's hashlib as the reference)."""
    import hashlib

    from trainkit.learning import models

    cfg = load_train_config("scratch", {"epochs": 1, "threads": 1})
    torch.manual_seed(3)
    wfile = tmp_path / "start.pth"
    torch.save(models.create_model(cfg.backbone, 7).state_dict(), wfile)
    calls = {"hash": 0, "read": 0}
    real_hash, real_read = models.file_sha256, models.read_state_dict

    def counted_hash(path):
        calls["hash"] += 1
        return real_hash(path)

    def counted_read(path):
        calls["read"] += 1
        return real_read(path)

    monkeypatch.setattr(models, "file_sha256", counted_hash)
    monkeypatch.setattr(models, "read_state_dict", counted_read)
    cfg = load_train_config("scratch", {"epochs": 1, "threads": 1, "weights": str(wfile)})
    train(ws, tmp_path / "w", cfg, resume=False)
    assert calls == {"hash": 1, "read": 1}
    ckpt = torch.load(tmp_path / "w" / "checkpoint.pt", weights_only=True)
    assert ckpt["weights"]["sha256"] == hashlib.sha256(wfile.read_bytes()).hexdigest()
