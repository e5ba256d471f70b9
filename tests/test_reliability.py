"""Untrusted files and interruptions: crafted pickles are refused; killed runs resume without loss."""

from __future__ import annotations

import csv
import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import torch
from PIL import Image

from trainkit.learning.models import create_model
from trainkit.learning.network import TrainingError, load_checkpoint


class _Payload:
    """Unpickling this would run a shell command that leaves a marker file."""

    def __init__(self, marker: str) -> None:
        self.marker = marker

    def __reduce__(self):
        return (os.system, (f"touch {self.marker}",))


def test_crafted_pickle_checkpoint_is_refused_and_runs_nothing(tmp_path):
    marker = tmp_path / "pwned"
    evil = tmp_path / "checkpoint.pt"
    torch.save({"format": "trainkit-checkpoint-1", "model": _Payload(str(marker))}, evil)
    with pytest.raises(TrainingError, match="cannot be loaded as a trainkit checkpoint"):
        load_checkpoint(evil)
    assert not marker.exists()


def test_crafted_pickle_weights_file_is_refused_and_runs_nothing(tmp_path):
    marker = tmp_path / "pwned"
    evil = tmp_path / "weights.pth"
    torch.save({"features.0.weight": _Payload(str(marker))}, evil)
    with pytest.raises(ValueError, match="not a loadable state dict"):
        create_model("tiny_cnn", 6, weights=evil)
    assert not marker.exists()


def _wait_for(pred, timeout: float) -> bool:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if pred():
            return True
        time.sleep(0.2)
    return False


def test_training_killed_mid_run_resumes_without_losing_or_repeating_epochs(demo_run, tmp_path):
    out, _ = demo_run
    ws = out / "workspace"
    exp = tmp_path / "exp"
    cmd = [
        sys.executable,
        "-m",
        "trainkit",
        "-q",
        "train",
        str(ws),
        "--out",
        str(exp),
        "--config",
        "demo",
        "--epochs",
        "4",
        "--threads",
        "1",
    ]
    env = dict(os.environ, OMP_NUM_THREADS="1")
    proc = subprocess.Popen(cmd, env=env)
    history = exp / "history.csv"

    def epochs_done() -> int:
        if not history.exists():
            return 0
        return len(list(csv.DictReader(history.open())))

    assert _wait_for(lambda: epochs_done() >= 1, 300), "training never finished an epoch"
    time.sleep(0.5)  # let it get into the next epoch
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    done_before = epochs_done()
    assert 1 <= done_before < 4
    res = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=600)
    assert res.returncode == 0, res.stderr
    rows = list(csv.DictReader(history.open()))
    assert [int(r["epoch"]) for r in rows] == [1, 2, 3, 4]
    model, ckpt, _ = load_checkpoint(exp)
    assert 1 <= ckpt["best_epoch"] <= 4


def test_scan_killed_mid_run_resumes_with_every_frame_exactly_once(tmp_path):
    from test_screener import brightness_model

    model = brightness_model(tmp_path / "m.onnx", threshold=0.9)
    frames = tmp_path / "frames"
    frames.mkdir()
    rng = np.random.default_rng(0)
    for i in range(150):
        Image.fromarray(rng.integers(0, 255, (96, 128, 3), dtype=np.uint8)).save(
            frames / f"f{i:03d}.png"
        )
    out = tmp_path / "out"
    cmd = [
        sys.executable,
        "-m",
        "trainkit",
        "-q",
        "scan",
        str(frames),
        "--model",
        str(model),
        "--out",
        str(out),
        "--overlays",
        "none",
    ]
    proc = subprocess.Popen(cmd)
    jsonl = out / "frames.jsonl"

    def n_lines() -> int:
        return jsonl.read_bytes().count(b"\n") if jsonl.exists() else 0

    assert _wait_for(lambda: n_lines() >= 10, 120)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    first = n_lines()
    subprocess.run(cmd, check=True, timeout=300)
    recs = [json.loads(x) for x in jsonl.read_text().splitlines()]
    names = sorted(r["frame"] for r in recs)
    assert names == sorted(str(p) for p in frames.iterdir())  # each exactly once
    assert first >= 10 and len(recs) == 150


WRITER = """
import sys
from trainkit.store.workspace import Workspace
ws = Workspace.open(sys.argv[1])
ids = [r.id for r in ws.patches()][: int(sys.argv[3])]
for i, pid in enumerate(ids):
    ws.add_labels([(pid, "none" if i % 2 else "map")], reviewer=sys.argv[2])
"""


def test_two_labellers_and_a_status_reader_while_tile_adds_photos(tmp_path):
    """WAL mode plus a busy timeout: no lost events and no 'database is locked' for the user."""
    from trainkit.cli import main

    rng = np.random.default_rng(0)
    first, more = tmp_path / "first", tmp_path / "more"
    for folder, n in ((first, 4), (more, 40)):
        folder.mkdir()
        for i in range(n):
            Image.fromarray(rng.integers(0, 255, (128, 192, 3), dtype=np.uint8)).save(
                folder / f"{folder.name}{i}.png"
            )
    ws = tmp_path / "ws"
    assert main(["-q", "tile", str(first), "--workspace", str(ws), "--tile-px", "64"]) == 0
    n_events = 24  # 4 photos x 6 patches
    env = dict(os.environ, OMP_NUM_THREADS="1")
    tile = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "trainkit",
            "-q",
            "tile",
            str(more),
            "--workspace",
            str(ws),
            "--tile-px",
            "64",
            "--workers",
            "2",
        ],
        env=env,
        stderr=subprocess.PIPE,
        text=True,
    )
    writers = [
        subprocess.Popen(
            [sys.executable, "-c", WRITER, str(ws), name, str(n_events)],
            env=env,
            stderr=subprocess.PIPE,
            text=True,
        )
        for name in ("ana", "ben")
    ]
    status_runs = 0
    while tile.poll() is None or any(w.poll() is None for w in writers):
        res = subprocess.run(
            [sys.executable, "-m", "trainkit", "-q", "status", str(ws), "--json"],
            capture_output=True,
            text=True,
            env=env,
        )
        assert res.returncode == 0 and "locked" not in res.stderr, res.stderr
        json.loads(res.stdout)
        status_runs += 1
    assert tile.returncode == 0 and "locked" not in tile.stderr.read()
    for w in writers:
        assert w.returncode == 0, w.stderr.read()
    from trainkit.store.workspace import Workspace

    store = Workspace.open(ws)
    events = [e for r in store.patches() for e in store.label_history(r.id)]
    assert len(events) == 2 * n_events  # every event kept, none duplicated
    assert sorted({e["reviewer"] for e in events}) == ["ana", "ben"]
    assert store.summary()["photos"] == 44 and status_runs >= 1


def test_same_seed_same_training(demo_run, tmp_path):
    """Two runs with one seed (one thread) give identical losses and weights."""
    from trainkit.learning.config import load_train_config
    from trainkit.learning.training import train
    from trainkit.store.workspace import Workspace

    out, _ = demo_run
    ws = Workspace.open(out / "workspace")
    cfg = load_train_config("demo", {"epochs": 1, "threads": 1, "seed": 3})
    runs = []
    for name in ("a", "b"):
        train(ws, tmp_path / name, cfg, resume=False)
        rows = list(csv.DictReader((tmp_path / name / "history.csv").open()))
        state = torch.load(tmp_path / name / "checkpoint.pt", weights_only=True)["model"]
        runs.append((rows[0]["train_loss"], state))
    assert runs[0][0] == runs[1][0]
    assert all(torch.equal(runs[0][1][k], runs[1][1][k]) for k in runs[0][1])
