"""The command line: help texts with examples, one-line errors, documented exit codes."""

from __future__ import annotations

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
