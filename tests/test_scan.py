"""Batch scan: one JSON line per frame, nothing lost or repeated across restarts, same on every engine."""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pytest
from PIL import Image
from test_screener import brightness_model

from trainkit.screener.scan import exit_code, read_done, recorded_line, scan_frames


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
    ov = Image.open(rec["overlay"])
    assert ov.size[0] == 768 and ov.size[1] > 512  # the frame at full size, legend below


def last_lines(path):
    """Frame -> its last line in frames.jsonl, parsed here with the json module directly."""
    return {r["frame"]: r for r in lines(path)}


def test_resumed_scan_still_reports_and_fails_on_unreadable_frames(tmp_path, capsys):
    """Issue 14: a second run over the same folder found nothing new and used to say
    '0 unreadable' and exit 0 although frames.jsonl held 4 error lines for its frames."""
    from trainkit.cli import main

    model = brightness_model(tmp_path / "m.onnx", threshold=0.9)
    d = tmp_path / "frames"
    d.mkdir()
    for i in range(2):
        Image.fromarray(np.full((64, 96, 3), 200, np.uint8)).save(d / f"good{i}.png")
    for i in range(4):
        (d / f"bad{i}.jpg").write_bytes(b"\xff\xd8\xff truncated %d" % i)
    out = tmp_path / "out"
    cmd = ["scan", str(d), "--model", str(model), "--out", str(out), "--overlays", "none"]

    assert main(cmd) == 1
    first = capsys.readouterr().out
    assert main(cmd) == 1  # nothing new, but the 4 are still recorded as unreadable
    second = capsys.readouterr().out
    assert "6 frames in this folder recorded, of which 4 unreadable (0 recorded earlier)" in first
    assert "6 frames in this folder recorded, of which 4 unreadable (4 recorded earlier)" in second
    assert main([*cmd, "--json"]) == 1
    res = json.loads(capsys.readouterr().out)
    assert (res["scanned"], res["errors"], res["resumed_skip"]) == (0, 0, 6)  # this run
    assert (res["recorded"], res["unreadable"], res["unreadable_earlier"]) == (6, 4, 4)
    last = last_lines(out / "frames.jsonl")
    assert sum(r["status"] == "error" for r in last.values()) == res["unreadable"]

    # the bad frames are replaced by readable ones (new content: new hash, scanned again)
    for i in range(4):
        arr = np.full((64, 96, 3), 200, np.uint8)
        arr[:32, :32] = 30 + i
        Image.fromarray(arr).save(d / f"bad{i}.jpg", quality=95)
    assert main([*cmd, "--json"]) == 0
    res = json.loads(capsys.readouterr().out)
    assert (res["scanned"], res["errors"], res["resumed_skip"]) == (4, 0, 2)
    assert (res["recorded"], res["unreadable"], res["unreadable_earlier"]) == (6, 0, 0)
    assert main(cmd) == 0
    assert "6 frames in this folder recorded, of which 0 unreadable (0 recorded earlier)" in (
        capsys.readouterr().out
    )
    # the old error lines stay as history; each frame's last line describes it as it now is
    recs = lines(out / "frames.jsonl")
    assert sum(r["status"] == "error" for r in recs) == 4
    assert all(r["status"] == "ok" for r in last_lines(out / "frames.jsonl").values())


def test_flagged_list_follows_each_frames_last_line(tmp_path):
    """A flagged frame replaced by a clean one leaves flagged.txt; the counts agree."""
    model = brightness_model(tmp_path / "m.onnx", threshold=0.9)
    d = frames(tmp_path, n=4)  # f1 and f3 have a dark corner: flagged
    out = tmp_path / "out"
    first = scan_frames(model, [d], out, overlays="none")
    assert (out / "flagged.txt").read_text().split() == [str(d / "f1.png"), str(d / "f3.png")]
    Image.fromarray(np.full((64, 96, 3), 210, np.uint8)).save(d / "f1.png")
    res = scan_frames(model, [d], out, overlays="none")
    assert res["scanned"] == 1 and res["flagged"] == 0
    assert (out / "flagged.txt").read_text().split() == [str(d / "f3.png")]
    assert first["flagged_recorded"] == 2 and first["unreadable"] == 1
    last = last_lines(out / "frames.jsonl")
    assert res["flagged_recorded"] == sum(bool(r.get("flagged")) for r in last.values()) == 1
    assert (res["unreadable"], res["unreadable_earlier"]) == (1, 1)  # broken.jpg, first run


def test_recorded_line_wording_and_exit_code(tmp_path):
    one = {"inputs": [str(tmp_path)], "recorded": 1, "unreadable": 1, "unreadable_earlier": 0}
    assert recorded_line(one) == (
        "1 frame in this folder recorded, of which 1 unreadable (0 recorded earlier)"
    )
    assert exit_code(one) == 1
    f = tmp_path / "a.png"
    f.write_bytes(b"")
    many = {"inputs": [str(f), str(tmp_path)], "recorded": 0, "unreadable": 0}
    many["unreadable_earlier"] = 0
    assert recorded_line(many) == (
        "0 frames of these 2 inputs recorded, of which 0 unreadable (0 recorded earlier)"
    )
    assert exit_code(many) == 0
    assert recorded_line(dict(one, inputs=[str(f)])).startswith("1 frame of this file recorded")


def test_scan_records_familiarity_per_frame_and_counts_unfamiliar_frames(tmp_path):
    model = brightness_model(tmp_path / "m.onnx", threshold=0.9, familiarity=5.0)
    d = frames(tmp_path)  # grey 200 everywhere except a dark corner: unlike "training" (128)
    summary = scan_frames(model, [d], tmp_path / "out")
    ok = [r for r in lines(tmp_path / "out" / "frames.jsonl") if r["status"] == "ok"]
    assert all(r["unfamiliar"] is True and r["familiarity_score"] > 5.0 for r in ok)
    assert summary["unfamiliar_recorded"] == len(ok) == 5 and summary["notes"] == []
    v1 = scan_frames(brightness_model(tmp_path / "v1.onnx"), [d], tmp_path / "out1")
    assert v1["unfamiliar_recorded"] is None and "no familiarity output" in v1["notes"][0]
