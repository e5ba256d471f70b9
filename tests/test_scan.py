"""Batch scan: one JSON line per frame, nothing lost or repeated across restarts, same on every engine."""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pytest
from PIL import Image
from test_screener import brightness_model

from trainkit.screener.scan import read_done, scan_frames


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


def lines(path):
    return [json.loads(x) for x in path.read_text().splitlines()]


def comparable(path):
    drop = {"seconds_decode", "seconds_model", "overlay"}
    return sorted(
        json.dumps({k: v for k, v in r.items() if k not in drop}, sort_keys=True)
        for r in lines(path)
    )


def test_scan_resumes_without_loss_or_repeat(tmp_path):
    model = brightness_model(tmp_path / "m.onnx", threshold=0.9)
    d = frames(tmp_path)
    out = tmp_path / "out"
    first = scan_frames(model, [d], out)
    assert first["scanned"] == 6 and first["flagged"] == 2 and first["errors"] == 1
    raw = (out / "frames.jsonl").read_text().splitlines()
    # simulate a kill mid-write: keep three lines and half of the fourth
    (out / "frames.jsonl").write_text("\n".join(raw[:3]) + "\n" + raw[3][: len(raw[3]) // 2])
    assert len(read_done(out / "frames.jsonl")) == 3  # torn line dropped
    again = scan_frames(model, [d], out)
    assert again["resumed_skip"] == 3 and again["scanned"] == 3
    recs = lines(out / "frames.jsonl")
    assert sorted(r["frame"] for r in recs) == sorted(str(p) for p in d.iterdir())
    ok = [r for r in recs if r["status"] == "ok"]
    for r in ok:
        assert r["sha256"] == hashlib.sha256(open(r["frame"], "rb").read()).hexdigest()
    flagged = [r for r in ok if r["flagged"]]
    assert all(r["flagged_boxes"][0]["box"] == [0, 0, 32, 32] for r in flagged)
    assert all(r["dominant_class"] == "crack" for r in flagged)
    assert all(r["overlay"].endswith("-overlay.jpg") for r in flagged)
    assert (out / "flagged.txt").read_text().split() == sorted(r["frame"] for r in flagged)
    broken = next(r for r in recs if r["frame"].endswith("broken.jpg"))
    assert broken["status"] == "error" and "broken.jpg" in broken["error"]


def test_changed_frame_is_scanned_again(tmp_path):
    model = brightness_model(tmp_path / "m.onnx", threshold=0.9)
    d = frames(tmp_path, n=2)
    out = tmp_path / "out"
    scan_frames(model, [d], out, overlays="none")
    arr = np.full((64, 96, 3), 20, np.uint8)
    Image.fromarray(arr).save(d / "f0.png")
    res = scan_frames(model, [d], out, overlays="none")
    assert res["scanned"] == 1 and res["resumed_skip"] == 2
    f0 = [r for r in lines(out / "frames.jsonl") if r["frame"].endswith("f0.png")]
    assert len(f0) == 2 and f0[0]["sha256"] != f0[1]["sha256"] and f0[1]["flagged_cells"] == 6


def test_process_pool_gives_the_same_lines(tmp_path):
    model = brightness_model(tmp_path / "m.onnx", threshold=0.9)
    d = frames(tmp_path)
    scan_frames(model, [d], tmp_path / "a", workers=1, overlays="none")
    scan_frames(model, [d], tmp_path / "b", workers=2, overlays="none")
    assert comparable(tmp_path / "a" / "frames.jsonl") == comparable(
        tmp_path / "b" / "frames.jsonl"
    )


def test_dask_engine_on_a_local_cluster_gives_the_same_lines(tmp_path):
    import distributed  # dev extra

    model = brightness_model(tmp_path / "m.onnx", threshold=0.9)
    d = frames(tmp_path)
    scan_frames(model, [d], tmp_path / "a", overlays="none")
    with distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None
    ) as cluster:
        res = scan_frames(
            model,
            [d],
            tmp_path / "b",
            overlays="none",
            engine="dask",
            scheduler=cluster.scheduler_address,
        )
    assert res["scanned"] == 6
    assert comparable(tmp_path / "a" / "frames.jsonl") == comparable(
        tmp_path / "b" / "frames.jsonl"
    )


def test_bad_options(tmp_path):
    model = brightness_model(tmp_path / "m.onnx")
    with pytest.raises(
        ValueError, match="invalid overlays 'some'; choose one of: flagged, all, none"
    ):
        scan_frames(model, [tmp_path], tmp_path / "o", overlays="some")
    with pytest.raises(ValueError, match="needs --scheduler"):
        scan_frames(model, [tmp_path], tmp_path / "o", engine="dask")


def test_reduced_size_jpeg_decoding_keeps_boxes_in_frame_pixels(tmp_path):
    """A 4x downscale (patch_mm 64 at 0.5 mm/px: 128 frame px per 32-px cell) decodes the JPEG
    at reduced size; boxes must still be in full-size frame pixels and cover the frame."""
    model = brightness_model(tmp_path / "m.onnx", threshold=0.9, patch_mm=64.0)
    d = tmp_path / "big"
    d.mkdir()
    arr = np.full((512, 768, 3), 200, np.uint8)
    arr[128:256, 256:384] = 20  # exactly one 128-px cell dark
    Image.fromarray(arr).save(d / "f.jpg", quality=95)
    res = scan_frames(model, [d], tmp_path / "out", gsd_mm=0.5, overlays="flagged")
    rec = lines(tmp_path / "out" / "frames.jsonl")[0]
    assert res["scanned"] == 1 and rec["width"] == 768 and rec["height"] == 512
    assert rec["cells"] == 4 * 6
    assert [b["box"] for b in rec["flagged_boxes"]] == [[256, 128, 384, 256]]
    assert Image.open(rec["overlay"]).size == (768, 512 + 34)
