"""Batch scan: one JSON line per frame, nothing lost or repeated across restarts, same on every engine."""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

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


# ----- bad frames, bad models and bad options (issue 27) ----------------------------------


def strict_lines(path):
    """frames.jsonl parsed refusing NaN and Infinity (not JSON under RFC 8259, section 6)."""
    refuse = lambda c: pytest.fail(f"{c} in {path.name}")  # noqa: E731
    return [json.loads(x, parse_constant=refuse) for x in path.read_text().splitlines()]


def _jpeg(arr, quality=92) -> bytes:
    import io

    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, format="JPEG", quality=quality)
    return buf.getvalue()


def _with_header_size(data: bytes, width: int, height: int) -> bytes:
    """The JPEG with the frame size in its SOF0 header replaced (ITU T.81 B.2.2 layout)."""
    i = data.index(b"\xff\xc0")
    return data[: i + 5] + height.to_bytes(2, "big") + width.to_bytes(2, "big") + data[i + 9 :]


def bad_frame_folder(tmp_path):
    """Two good 512 x 768 JPEGs (one with a dark cell), a truncated JPEG and a JPEG whose
    header claims 20000 x 20000 px (a decompression bomb: 400 Mpx in a few kB)."""
    d = tmp_path / "frames"
    d.mkdir()
    arr = np.full((512, 768, 3), 200, np.uint8)
    (d / "a_good.jpg").write_bytes(_jpeg(arr))
    arr[128:256, 256:384] = 20
    (d / "b_good.jpg").write_bytes(_jpeg(arr))
    noisy = np.random.default_rng(0).integers(0, 255, (512, 768, 3), dtype=np.uint8)
    full = _jpeg(noisy)
    (d / "c_truncated.jpg").write_bytes(full[: len(full) // 2])
    (d / "d_bomb.jpg").write_bytes(_with_header_size(_jpeg(arr[:64, :64]), 20000, 20000))
    return d


def _cascade_with_scale(tmp_path):
    """The contract-3 cascade of test_screener, its metadata given a patch size in mm."""
    import onnx
    from test_screener import _cascade_model

    path = _cascade_model(tmp_path, 0.5)
    proto = onnx.load(path)
    meta = {p.key: p.value for p in proto.metadata_props}
    meta["patch_mm"] = json.dumps(64.0)
    onnx.helper.set_model_props(proto, meta)
    onnx.save(proto, path)
    return path


BAD_FRAME_PATHS = {
    # name: (scan options, cascade model?)
    "plain": ([], False),
    "gsd": (["--gsd-mm", "0.5"], False),  # 4x downscale: the reduced-size JPEG decode
    "gsd, 2 processes": (["--gsd-mm", "0.5", "--workers", "2"], False),
    "gsd, cascade": (["--gsd-mm", "0.5"], True),
}


@pytest.mark.parametrize("case", sorted(BAD_FRAME_PATHS))
def test_bad_frames_are_recorded_named_on_stderr_and_the_scan_goes_on(tmp_path, capsys, case):
    """Issue 27: with --gsd-mm one truncated JPEG stopped the whole scan (exit 2, file not
    named, no lines) and a 20000 x 20000 header ended in a DecompressionBombError traceback.
    On every path each is recorded as unreadable with its reason, named on stderr (README:
    unreadable files are named on stderr), and the good frames are scanned (exit 1)."""
    from trainkit.cli import main

    options, cascade = BAD_FRAME_PATHS[case]
    model = (
        _cascade_with_scale(tmp_path)
        if cascade
        else brightness_model(tmp_path / "m.onnx", threshold=0.9, patch_mm=64.0)
    )
    d = bad_frame_folder(tmp_path)
    out = tmp_path / "out"
    code = main(["-q", "scan", str(d), "--model", str(model), "--out", str(out), *options])
    err = capsys.readouterr().err.splitlines()
    assert code == 1, err
    recs = {Path(r["frame"]).name: r for r in strict_lines(out / "frames.jsonl")}
    assert sorted(recs) == ["a_good.jpg", "b_good.jpg", "c_truncated.jpg", "d_bomb.jpg"]
    assert recs["a_good.jpg"]["status"] == recs["b_good.jpg"]["status"] == "ok"
    trunc, bomb = recs["c_truncated.jpg"], recs["d_bomb.jpg"]
    assert trunc["status"] == "error" and "c_truncated.jpg cannot be decoded" in trunc["error"]
    assert bomb["status"] == "error" and "d_bomb.jpg is larger than the limit" in bomb["error"]
    assert "20000 x 20000" in bomb["error"]
    assert not any("Traceback" in line for line in err)
    assert f"trainkit: {trunc['error']}; skipped" in err
    assert f"trainkit: {bomb['error']}; skipped" in err


def test_bad_frames_on_the_dask_engine_with_a_scale(tmp_path):
    import distributed  # dev extra

    model = brightness_model(tmp_path / "m.onnx", threshold=0.9, patch_mm=64.0)
    d = bad_frame_folder(tmp_path)
    with distributed.LocalCluster(
        n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None
    ) as cluster:
        res = scan_frames(
            model, [d], tmp_path / "out", gsd_mm=0.5, engine="dask",
            scheduler=cluster.scheduler_address,
        )  # fmt: skip
    assert (res["scanned"], res["errors"]) == (4, 2)
    errors = [r["error"] for r in strict_lines(tmp_path / "out" / "frames.jsonl") if "error" in r]
    assert any("c_truncated.jpg cannot be decoded" in e for e in errors)
    assert any("d_bomb.jpg is larger than the limit" in e for e in errors)


def test_a_model_refused_at_load_leaves_no_output_folder(tmp_path):
    from trainkit.screener.model import ScreenerError

    model = brightness_model(tmp_path / "m.onnx", meta_extra={"threshold": "NaN"})
    out = tmp_path / "out"
    with pytest.raises(ScreenerError, match="threshold is NaN"):
        scan_frames(model, [frames(tmp_path)], out)
    assert not out.exists()  # no empty OUT/overlays/ left behind


def test_no_nan_or_infinity_in_any_scan_output(tmp_path):
    """A familiarity the model cannot compute (NaN) is written as null, never as bare NaN;
    the frame is said to be unfamiliar. frames.jsonl and scan.json parse as strict JSON."""
    from test_screener import constant_model

    model = constant_model(tmp_path / "m.onnx", (0.9, 0.1), familiarity=float("nan"))
    out = tmp_path / "out"
    res = scan_frames(model, [frames(tmp_path, n=2)], out, overlays="none")
    ok = [r for r in strict_lines(out / "frames.jsonl") if r["status"] == "ok"]
    assert len(ok) == 2 and all(r["familiarity_score"] is None for r in ok)
    assert all(r["unfamiliar"] is True for r in ok) and res["unfamiliar_recorded"] == 2
    json.loads((out / "scan.json").read_text(), parse_constant=lambda c: pytest.fail(c))


def test_a_model_giving_nan_stops_the_scan_and_records_no_clean_frame(tmp_path):
    """NaN probabilities compared as 'below the threshold': every frame looked clean (exit 0).
    The model is at fault, so the scan stops naming it; no frame is recorded as scored."""
    from test_screener import constant_model

    from trainkit.screener.model import ScreenerError

    model = constant_model(tmp_path / "m.onnx", (float("nan"), float("nan")))
    out = tmp_path / "out"
    with pytest.raises(ScreenerError, match=r"m.onnx gave probabilities with non-finite"):
        scan_frames(model, [frames(tmp_path, n=2)], out, overlays="none")
    recs = strict_lines(out / "frames.jsonl")
    assert not any(r["status"] == "ok" for r in recs)  # broken.jpg's error line at most


@pytest.mark.parametrize("content", [[], ["notes.txt", "anim.gif"]])
def test_a_folder_without_frames_is_an_error_as_in_tile(tmp_path, capsys, content):
    """`tile` says 'no image files found' (exit 2); `scan` said '0 frames scanned', exit 0."""
    from trainkit.cli import main

    model = brightness_model(tmp_path / "m.onnx")
    d = tmp_path / "frames"
    d.mkdir()
    for name in content:
        (d / name).write_bytes(b"GIF89a")
    out = tmp_path / "out"
    assert main(["scan", str(d), "--model", str(model), "--out", str(out)]) == 2
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1 and err[0].startswith(f"trainkit: no image files found in {d}")
    if content:
        assert "2 other files" in err[0] and "anim.gif" in err[0]
    assert not out.exists()


def test_skipped_files_and_multi_page_frames_are_said_once(tmp_path, capsys):
    from trainkit.cli import main

    model = brightness_model(tmp_path / "m.onnx", threshold=0.9)
    d = frames(tmp_path, n=2)
    (d / "broken.jpg").unlink()
    for name in ("anim.gif", "still.gif", "readme.txt"):
        (d / name).write_bytes(b"GIF89a")
    pages = [Image.fromarray(np.full((64, 96, 3), v, np.uint8)) for v in (200, 20, 20)]
    pages[0].save(d / "stack.tif", save_all=True, append_images=pages[1:])
    out = tmp_path / "out"
    cmd = ["-q", "scan", str(d), "--model", str(model), "--out", str(out)]
    assert main(cmd) == 0
    err = capsys.readouterr().err.splitlines()
    skipped = [line for line in err if "skipped" in line]
    assert len(skipped) == 1, err
    assert skipped[0].startswith("trainkit: 3 files skipped: not a photo format the kit reads")
    assert "2 .gif, 1 .txt" in skipped[0] and "e.g. " in skipped[0]
    assert err.count("trainkit: photo stack.tif has 3 pages; only page 1 is used") == 1
    rec = next(r for r in strict_lines(out / "frames.jsonl") if r["frame"].endswith(".tif"))
    assert rec["status"] == "ok" and rec["notes"] == [
        "photo stack.tif has 3 pages; only page 1 is used"
    ]
    assert rec["flagged"] is False  # page 1 is the bright one


@pytest.mark.parametrize("value", ["nan", "inf", "0", "-1"])
def test_gsd_option_must_be_finite_and_positive(tmp_path, capsys, value):
    from trainkit.cli import main

    model = brightness_model(tmp_path / "m.onnx", patch_mm=16.0)
    out = tmp_path / "out"
    d = frames(tmp_path, n=1)
    code = main(["scan", str(d), "--model", str(model), "--out", str(out), f"--gsd-mm={value}"])
    assert code == 2
    assert "--gsd-mm" in capsys.readouterr().err
    assert not out.exists()
    with pytest.raises(ValueError, match="gsd_mm must be a finite number above 0"):
        scan_frames(model, [d], out, gsd_mm=float(value))


def test_a_failed_write_names_the_file(tmp_path, monkeypatch):
    """'No space left on device' said nothing about which file could not be written."""
    import errno
    import os

    import trainkit.screener.scan as scan_module
    from trainkit.screener.model import ScreenerError

    model = brightness_model(tmp_path / "m.onnx", threshold=0.9)
    d = frames(tmp_path, n=2)
    out = tmp_path / "out"

    def full(_fd):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(scan_module.os, "fsync", full)
    with pytest.raises(ScreenerError) as err:
        scan_frames(model, [d], out, overlays="none")
    assert str(out / "frames.jsonl") in str(err.value)
    assert "No space left on device" in str(err.value)
    monkeypatch.undo()

    def full_text(path, text):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(scan_module, "atomic_write_text", full_text)
    with pytest.raises(ScreenerError, match=str(out / "flagged.txt")):
        scan_frames(model, [d], out, overlays="none")


def test_frame_paths_are_absolute_and_older_relative_records_still_resume(tmp_path, monkeypatch):
    """A scan run with a relative folder stored relative paths: `sample` run from elsewhere
    could not find the frames. Paths are stored absolute; older relative records resolve
    against the scan's recorded working folder (else the current one, as before)."""
    model = brightness_model(tmp_path / "m.onnx", threshold=0.9)
    d = frames(tmp_path, n=2)
    monkeypatch.chdir(tmp_path)
    scan_frames(model, [Path("frames")], tmp_path / "out", overlays="none")
    recs = lines(tmp_path / "out" / "frames.jsonl")
    assert all(Path(r["frame"]).is_absolute() and Path(r["frame"]).is_file() for r in recs)
    scan_record = json.loads((tmp_path / "out" / "scan.json").read_text())
    assert scan_record["working_folder"] == str(tmp_path)

    # an older scan's lines: relative to where it ran (tmp_path), its scan.json says so
    old = tmp_path / "old"
    old.mkdir()
    rel = [dict(r, frame=os.path.relpath(r["frame"], tmp_path)) for r in recs]
    (old / "frames.jsonl").write_text("".join(json.dumps(r) + "\n" for r in rel))
    (old / "scan.json").write_text(json.dumps({"working_folder": str(tmp_path)}))
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    res = scan_frames(model, [d], old, overlays="none")
    assert (res["resumed_skip"], res["scanned"], res["recorded"]) == (3, 0, 3)
    # without a recorded working folder: relative to the current folder, as before
    (old / "scan.json").unlink()
    monkeypatch.chdir(tmp_path)
    res = scan_frames(model, [Path("frames")], old, overlays="none")
    assert (res["resumed_skip"], res["scanned"]) == (3, 0)


def test_decode_ahead_is_bounded_by_pixels(tmp_path, monkeypatch):
    """Frames are decoded ahead while the model runs, but never more pixels at once than the
    budget (at least one frame): three large frames are no longer held together."""
    import trainkit.screener.scan as scan_module

    model = brightness_model(tmp_path / "m.onnx", threshold=0.9)
    d = tmp_path / "frames"
    d.mkdir()
    sizes = {"a.png": (200, 300), "b.png": (200, 300), "c.png": (40, 30), "d.png": (40, 30)}
    for name, (h, w) in sizes.items():
        Image.fromarray(np.full((h, w, 3), 200, np.uint8)).save(d / name)
    held, peak = [0], [0]
    decode, finish = scan_module._decode_and_cut, scan_module._finish

    def counting_decode(screener, path, *args):
        h, w = sizes[path.name]
        held[0] += h * w
        peak[0] = max(peak[0], held[0])
        return decode(screener, path, *args)

    def counting_finish(screener, rec, frame, overlays, overlay_dir):
        h, w = sizes[Path(rec["frame"]).name]
        try:
            return finish(screener, rec, frame, overlays, overlay_dir)
        finally:
            held[0] -= h * w

    monkeypatch.setattr(scan_module, "_decode_and_cut", counting_decode)
    monkeypatch.setattr(scan_module, "_finish", counting_finish)
    monkeypatch.setattr(scan_module, "DECODE_AHEAD_PIXELS", 70_000)
    res = scan_frames(model, [d], tmp_path / "out", overlays="none")
    assert res["scanned"] == 4 and held[0] == 0
    assert 60_000 < peak[0] <= 70_000  # a large frame and small ones, never both large ones
    monkeypatch.setattr(scan_module, "DECODE_AHEAD_PIXELS", 10)
    peak[0] = 0
    scan_frames(model, [d], tmp_path / "out2", overlays="none")
    assert peak[0] == 60_000  # below one frame: one at a time


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs Linux /proc")
def test_scan_of_a_large_sixteen_bit_frame_stays_small(tmp_path):
    """Issue 27: a 463 kB 16-bit 15000 x 15000 PNG peaked at 6.27 GB in `scan`. Here an
    8000 x 8000 one (64 Mpx; 1.78 GB peak before the fix, measured here) is scanned in a
    fresh process, overlays on and the frame flagged; generous bound 0.8 GB."""
    import subprocess
    import sys

    model = brightness_model(tmp_path / "m.onnx", patch_px=128, threshold=0.9)
    d = tmp_path / "big"
    d.mkdir()
    levels = np.full((8000, 8000), 50000, np.uint16)
    levels[1000:1128, 1000:1128] = 2000  # one dark cell: the frame is flagged
    Image.fromarray(levels).save(d / "g16.png", compress_level=1)
    code = (
        "import json; from trainkit.screener.scan import scan_frames; "
        f"r = scan_frames({str(model)!r}, [{str(d)!r}], {str(tmp_path / 'out')!r}); "
        "peak = next(int(x.split()[1]) for x in open('/proc/self/status') if x[:6] == 'VmHWM:'); "
        "print(json.dumps([r['scanned'], r['flagged'], r['errors'], peak]))"
    )  # VmHWM (proc(5)): the peak since exec; ru_maxrss would include the forked worker's
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    scanned, flagged, errors, peak_kb = json.loads(res.stdout)
    assert (scanned, flagged, errors) == (1, 1, 0)
    assert peak_kb / 1024 < 800, f"the scan peaked at {peak_kb / 1024:.0f} MB"
    rec = lines(tmp_path / "out" / "frames.jsonl")[0]
    assert Image.open(rec["overlay"]).size[0] <= 8000


def test_a_frame_refused_as_too_large_is_scanned_once_the_limit_is_raised(tmp_path):
    """An unchanged unreadable frame is not decoded again on a resume, except when it was
    refused under a lower pixel limit than this run's (``--max-megapixels`` raised)."""
    model = brightness_model(tmp_path / "m.onnx", threshold=0.9)
    d = tmp_path / "frames"
    d.mkdir()
    Image.fromarray(np.full((300, 300, 3), 200, np.uint8)).save(d / "big.png")
    out = tmp_path / "out"
    first = scan_frames(model, [d], out, overlays="none", max_pixels=50_000)
    assert (first["errors"], first["unreadable"]) == (1, 1)
    same = scan_frames(model, [d], out, overlays="none", max_pixels=50_000)
    assert (same["scanned"], same["resumed_skip"], same["unreadable"]) == (0, 1, 1)
    raised = scan_frames(model, [d], out, overlays="none", max_pixels=1_000_000)
    assert (raised["scanned"], raised["errors"], raised["unreadable"]) == (1, 0, 0)
