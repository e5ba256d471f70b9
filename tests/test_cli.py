"""The command line: help texts with examples, one-line errors, documented exit codes."""

from __future__ import annotations

import csv
import json
import re
import subprocess
import sys

import numpy as np
import pytest
from click.testing import CliRunner
from PIL import Image

from trainkit.cli import cli, main

COMMANDS = [
    "synth",
    "tile",
    "pick",
    "review",
    "split",
    "train",
    "evaluate",
    "export",
    "scan",
    "status",
    "demo",
]


def test_top_level_help_lists_every_command_and_the_caution():
    res = CliRunner().invoke(cli, ["--help"])
    assert res.exit_code == 0
    for c in COMMANDS:
        assert c in res.output
    assert "not an inspection" in res.output


@pytest.mark.parametrize("command", COMMANDS)
def test_every_subcommand_has_help_with_an_example(command):
    res = CliRunner().invoke(cli, [command, "--help"])
    assert res.exit_code == 0
    assert re.search(rf"Examples?: trainkit {command}\b", res.output)


def test_python_dash_m_works():
    res = subprocess.run(
        [sys.executable, "-m", "trainkit", "--version"], capture_output=True, text=True
    )
    assert res.returncode == 0 and "trainkit" in res.stdout


def test_usage_errors_exit_2_without_traceback(tmp_path, capsys):
    assert main(["split", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert (
        err.startswith("trainkit: ")
        and "not a trainkit workspace" in err
        and "Traceback" not in err
    )
    assert main(["frobnicate"]) == 2
    assert (
        main(["train", str(tmp_path), "--out", str(tmp_path / "e"), "--config", "nope.yaml"]) == 2
    )
    assert "neither a built-in recipe" in capsys.readouterr().err


def test_tile_skips_bad_photos_with_exit_1(tmp_path, capsys):
    photos = tmp_path / "photos"
    photos.mkdir()
    Image.fromarray(np.random.default_rng(0).integers(0, 255, (100, 150, 3), dtype=np.uint8)).save(
        photos / "ok.png"
    )
    (photos / "bad.jpg").write_text("this is text, not a JPEG")
    code = main(["-q", "tile", str(photos), "--workspace", str(tmp_path / "ws"), "--tile-px", "64"])
    assert code == 1
    err = capsys.readouterr().err
    assert "trainkit: photo bad.jpg cannot be decoded" in err
    assert main(["-q", "status", str(tmp_path / "ws"), "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["photos"] == 1 and info["patches"] == 6  # 100 x 150 at 64 px: 2 rows x 3 columns
    assert info["unlabeled"] == 6 and sum(info["labeled"].values()) == 0
    assert set(info) >= {"photos", "patches", "flagged", "labeled", "unlabeled", "splits"}


def test_synth_then_status(tmp_path, capsys):
    assert (
        main(
            [
                "-q",
                "synth",
                str(tmp_path / "s"),
                "--photos",
                "2",
                "--size",
                "256x128",
                "--tile-px",
                "64",
            ]
        )
        == 0
    )
    assert len(list((tmp_path / "s" / "photos").glob("*.jpg"))) == 2
    assert main(["-q", "synth", str(tmp_path / "t"), "--size", "big"]) == 2
    assert "--size must look like 768x512" in capsys.readouterr().err


def test_damaged_database_is_one_line_not_a_traceback(tmp_path, capsys):
    ws = tmp_path / "ws"
    ws.mkdir()
    (ws / "workspace.sqlite").write_bytes(b"this is not a database" * 100)
    assert main(["status", str(ws)]) == 2
    err = capsys.readouterr().err
    assert (
        err.startswith("trainkit: the workspace database could not be used")
        and "Traceback" not in err
    )


def _photos(folder, n=2, size=(100, 150)):
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(0)
    for i in range(n):
        Image.fromarray(rng.integers(0, 255, (*size, 3), dtype=np.uint8)).save(folder / f"p{i}.png")
    return folder


def test_tile_defaults_to_the_default_recipes_patch_size(tmp_path, capsys):
    from trainkit.learning.config import load_train_config
    from trainkit.store.workspace import Workspace

    photos = _photos(tmp_path / "photos", n=1, size=(300, 300))
    assert main(["-q", "tile", str(photos), "--workspace", str(tmp_path / "ws")]) == 0
    patch_px = load_train_config("default").patch_px
    assert Workspace.open(tmp_path / "ws").tile_px == patch_px
    assert main(["tile", "--help"]) == 0
    out = capsys.readouterr().out
    assert f"[default: {patch_px};" in out and "--tile-px 224" not in out


def test_train_warns_when_the_workspace_patches_differ_from_the_recipe(
    tmp_path, capsys, monkeypatch
):
    from trainkit.core.taxonomy import load_class_set
    from trainkit.store.workspace import Workspace

    Workspace.create(tmp_path / "ws", class_set=load_class_set("orientation"), tile_px=224)
    result = {
        "best_epoch": 1,
        "best_val": {"val_recall_at_fa": 1.0, "val_balanced_accuracy": 1.0},
        "median_images_per_second": 10.0,
    }
    monkeypatch.setattr("trainkit.learning.training.train", lambda *a, **k: result)
    assert main(["-q", "train", str(tmp_path / "ws"), "--out", str(tmp_path / "e")]) == 0
    err = capsys.readouterr().err
    assert "the workspace's patches are 224 px but the recipe is made for 128 px" in err
    assert "(224/128)^2 = 3.1x" in err  # (224 / 128)^2 = 3.0625


def test_importing_the_same_labels_with_tile_again_adds_no_events(tmp_path, capsys):
    photos = _photos(tmp_path / "photos")
    labels = tmp_path / "labels.csv"
    labels.write_text("photo,x0,y0,x1,y1,label\np0.png,0,0,64,64,none\np1.png,64,0,128,64,map\n")
    args = ["tile", str(photos), "-w", str(tmp_path / "ws"), "--tile-px", "64"]
    assert main([*args, "--import-labels", str(labels)]) == 0
    assert "imported 2 labels" in capsys.readouterr().out
    assert main([*args, "--import-labels", str(labels)]) == 0
    out = " ".join(capsys.readouterr().out.split())  # the console wraps long lines
    assert "imported 0 labels" in out and "2 already recorded with the same label" in out
    from trainkit.store.workspace import Workspace

    assert len(Workspace.open(tmp_path / "ws").label_events()) == 2


def test_an_oversized_csv_field_is_one_line_not_a_crash(tmp_path, capsys):
    photos = _photos(tmp_path / "photos", n=1)
    assert main(["-q", "tile", str(photos), "-w", str(tmp_path / "ws"), "--tile-px", "64"]) == 0
    huge = tmp_path / "huge.csv"
    huge.write_text("patch_id,label\n1,none\n2," + "x" * 200_000 + "\n")
    assert main(["review", str(tmp_path / "ws"), "--import-csv", str(huge)]) == 2
    err = capsys.readouterr().err
    assert err.splitlines() == [
        f"trainkit: label file huge.csv line 3: a field is longer than {csv.field_size_limit()} "
        "characters (is it the right file, with matching quotes?)"
    ]


def test_a_decompression_bomb_header_is_one_skip_line(tmp_path):
    """A PNG header claiming 20000 x 20000 pixels (a few hundred bytes) is skipped in one line."""
    import struct
    import zlib

    def chunk(kind, data):
        return (
            struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))
        )

    photos = _photos(tmp_path / "photos", n=1)
    ihdr = struct.pack(">IIBBBBB", 20000, 20000, 8, 2, 0, 0, 0)
    (photos / "bomb.png").write_bytes(
        b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(b"\0" * 99))
    )
    # A real process: pytest would catch the Python warning that used to reach stderr.
    args = ["-q", "tile", str(photos), "-w", str(tmp_path / "ws"), "--tile-px", "64"]
    res = subprocess.run(
        [sys.executable, "-m", "trainkit", *args], capture_output=True, text=True, timeout=120
    )
    assert res.returncode == 1
    (line,) = res.stderr.splitlines()  # Pillow's DecompressionBombWarning used to add two lines
    assert line.startswith("trainkit: photo bomb.png is larger than the limit") and line.endswith(
        "; skipped"
    )


def test_the_confusion_matrix_says_it_counts_the_likeliest_class(demo_run):
    """The matrix uses argmax, the headline the threshold: both places say so in one sentence."""
    import io

    from rich.console import Console

    from trainkit.cli.tables import print_evaluation

    out, _ = demo_run
    res = json.loads((out / "evaluation/metrics.json").read_text(encoding="utf-8"))
    buf = io.StringIO()
    print_evaluation(Console(file=buf, width=200), res, out / "evaluation")
    text = " ".join(buf.getvalue().split())
    thr = res["screening"]["threshold"]
    assert (
        "predicted = the likeliest class; screening instead flags a patch when its crack "
        f"probability 1 - P(none) reaches the threshold {thr:.3f}"
    ) in text
    page = " ".join((out / "evaluation/report.html").read_text(encoding="utf-8").split())
    assert "columns: predicted class, the model's likeliest class" in page
    assert (
        "This is not how the screener decides: it flags a patch when its crack probability" in page
    )


def test_export_says_warned_not_flagged_for_unfamiliar_frames(tmp_path, capsys, monkeypatch):
    """'Flagged' is the word for cells that may hold a crack; unfamiliar frames get a warning."""
    exp = tmp_path / "exp"
    exp.mkdir()
    res = {
        "model": str(exp / "model.onnx"),
        "bytes": 1e6,
        "exporter": "dynamo",
        "parity_max_abs_diff": 1e-7,
        "parity_patches": 8,
        "threshold": 0.3,
        "evaluated": True,
        "contract": "trainkit-screener-2",
        "familiarity": {"threshold": 1.5, "calibration_frames": 12, "false_warning_bound": 0.1},
    }
    monkeypatch.setattr("trainkit.export.onnx_file.export_experiment", lambda *a, **k: res)
    assert main(["export", str(exp)]) == 0
    out = " ".join(capsys.readouterr().out.split())
    assert (
        "gets an unfamiliar-surface warning when its cells' median familiarity exceeds 1.50" in out
    )
    assert "at most 10% of frames like them are warned about" in out
    assert "flagged" not in out


@pytest.mark.parametrize(
    "args",
    [
        ["tile", "PHOTOS", "-w", "WS", "--gsd-mm", "nan"],
        ["tile", "PHOTOS", "-w", "WS", "--tile-mm", "inf"],
        ["evaluate", "EXP", "--target-recall", "nan"],
        ["scan", "PHOTOS", "--model", "EXP", "--out", "WS", "--gsd-mm", "nan"],
        ["scan", "PHOTOS", "--model", "EXP", "--out", "WS", "--max-megapixels", "nan"],
        ["verify", "PHOTOS", "--workspace", "EXP", "--require-recall", "nan"],
        ["verify", "PHOTOS", "--workspace", "EXP", "--target-recall", "nan"],
    ],
)
def test_nan_and_infinity_are_refused_at_the_option(tmp_path, capsys, args):
    # NaN compares False with every bound, so a plain click.FloatRange lets it through and
    # every frame then fails later.
    photos = _photos(tmp_path / "photos", n=1)
    swap = {"PHOTOS": str(photos), "WS": str(tmp_path / "ws"), "EXP": str(tmp_path)}
    assert main([swap.get(a, a) for a in args]) == 2
    (line,) = capsys.readouterr().err.splitlines()
    assert "is not a finite number" in line and line.startswith("trainkit: invalid value for")


@pytest.mark.parametrize("module", ["trainkit.cli.synth", "trainkit.cli.tile"])
def test_tile_px_defaults_follow_the_default_recipe(monkeypatch, module):
    # synth and tile cut the grid the default recipe trains on: their --tile-px default is
    # read from the recipe, so a recipe with another patch size moves both.
    import importlib

    import click

    from trainkit.learning import config

    mod = importlib.import_module(module)
    monkeypatch.setattr(config, "recipe_patch_px", lambda name="default": 96)
    try:
        fresh = importlib.reload(mod)
        command = next(c for c in vars(fresh).values() if isinstance(c, click.Command))
        (opt,) = [p for p in command.params if p.name == "tile_px"]
        assert opt.default == 96
    finally:
        monkeypatch.undo()
        importlib.reload(mod)


def test_tile_names_skipped_files_and_notes_multi_page_photos(tmp_path, capsys):
    """As scan does: other files in a folder are counted by suffix with an example, and a
    multi-page TIFF says that only its first page is tiled."""
    photos = _photos(tmp_path / "photos", n=1)
    (photos / "notes.txt").write_text("site notes")
    (photos / "readme.txt").write_text("x")
    Image.new("RGB", (40, 40)).save(photos / "anim.gif")
    pages = [Image.new("RGB", (100, 150), (v, v, v)) for v in (50, 100, 150)]
    pages[0].save(photos / "multi.tif", save_all=True, append_images=pages[1:])
    assert main(["-q", "tile", str(photos), "-w", str(tmp_path / "ws"), "--tile-px", "64"]) == 0
    err = capsys.readouterr().err.splitlines()
    (skip,) = [line for line in err if "skipped: not a photo format" in line]
    assert skip.startswith("trainkit: 3 files skipped") and "2 .txt, 1 .gif" in skip
    assert "e.g. " in skip
    assert "trainkit: photo multi.tif has 3 pages; only page 1 is used" in err
