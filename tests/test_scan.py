"""Batch scan: one JSON line per frame, nothing lost or repeated across restarts."""

from __future__ import annotations

import json

import numpy as np
from PIL import Image
from test_screener import brightness_model

from trainkit.scan import read_done, scan_frames


def frames(tmp_path, n=5):
    d = tmp_path / "frames"
    d.mkdir()
    for i in range(n):
        arr = np.full((64, 96, 3), 200, np.uint8)
        if i % 2:
            arr[:32, :32] = 30
        Image.fromarray(arr).save(d / f"f{i}.png")
    (d / "broken.jpg").write_bytes(b"\xff\xd8\xff truncated")
    return d


def test_scan_resumes_without_loss_or_repeat(tmp_path):
    model = brightness_model(tmp_path / "m.onnx", threshold=0.9)
    d = frames(tmp_path)
    out = tmp_path / "out"
    first = scan_frames(model, [d], out)
    assert first["scanned"] == 6 and first["flagged"] == 2 and first["unreadable"] == 1
    lines = (out / "frames.jsonl").read_text().splitlines()
    # simulate a crash mid-write: drop the last two lines and leave half of one
    keep = "\n".join(lines[:3]) + "\n" + lines[3][: len(lines[3]) // 2]
    (out / "frames.jsonl").write_text(keep)
    assert len(read_done(out / "frames.jsonl")) == 3  # torn line dropped
    again = scan_frames(model, [d], out)
    assert again["resumed_skip"] == 3 and again["scanned"] == 3
    recs = [json.loads(x) for x in (out / "frames.jsonl").read_text().splitlines()]
    assert sorted(r["frame"] for r in recs) == sorted(str(p) for p in d.iterdir())
    assert len(recs) == 6
    flagged = [r for r in recs if r.get("flagged")]
    assert all(r["flagged_boxes"][0]["box"] == [0, 0, 32, 32] for r in flagged)
    assert all(
        (out / "overlays" / f"{r['frame'].split('/')[-1].rsplit('.', 1)[0]}-overlay.jpg").exists()
        for r in flagged
    )
    broken = next(r for r in recs if r["frame"].endswith("broken.jpg"))
    assert broken["status"] == "skipped" and "broken.jpg" in broken["error"]


def test_scan_with_two_worker_processes_gives_the_same_lines(tmp_path):
    model = brightness_model(tmp_path / "m.onnx", threshold=0.9)
    d = frames(tmp_path)
    a = scan_frames(model, [d], tmp_path / "a", workers=1, overlays=False)
    b = scan_frames(model, [d], tmp_path / "b", workers=2, overlays=False)
    assert a["flagged"] == b["flagged"]

    def strip(path):
        return sorted(
            json.dumps({k: v for k, v in json.loads(x).items() if k != "seconds"}, sort_keys=True)
            for x in path.read_text().splitlines()
        )

    assert strip(tmp_path / "a" / "frames.jsonl") == strip(tmp_path / "b" / "frames.jsonl")
