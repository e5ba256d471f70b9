"""One root error: every user-facing error derives from TrainkitError; the CLI prints those as
one line and shows anything else as a bug, with its traceback and an exit code of its own."""

from __future__ import annotations

import errno
import importlib
import pkgutil
import re
import sqlite3
from pathlib import Path

import pytest

import trainkit
from trainkit.cli import main
from trainkit.cli.codes import EXIT_CODES, EXIT_CRASH, EXIT_INTERRUPTED, EXIT_USAGE
from trainkit.core.errors import TrainkitError

README = Path(__file__).resolve().parents[1] / "README.md"


def _kit_modules():
    for info in pkgutil.walk_packages(trainkit.__path__, "trainkit."):
        if info.name.endswith("__main__"):
            continue
        yield importlib.import_module(info.name)


def test_every_error_class_of_the_kit_derives_from_the_root_error():
    found = {}
    for module in _kit_modules():
        for name, obj in vars(module).items():
            if (
                isinstance(obj, type)
                and issubclass(obj, ValueError)
                and obj.__module__ == module.__name__
            ):
                found[f"{module.__name__}.{name}"] = obj
    assert len(found) >= 21  # the error classes as of this test (TrainkitError included)
    not_rooted = [n for n, cls in found.items() if not issubclass(cls, TrainkitError)]
    assert not_rooted == []
    # ValueError stays a base, so `except ValueError` written against the older errors works.
    assert issubclass(TrainkitError, ValueError)


def _synth_args(tmp_path):
    return ["synth", str(tmp_path / "s"), "--photos", "1", "--size", "64x64", "--tile-px", "32"]


@pytest.mark.parametrize(
    "exc",
    [
        ZeroDivisionError("division by zero"),
        IndexError("index 7 is out of bounds for axis 0 with size 3"),
        # A ValueError from numpy is a bug too, not a user's mistake: not a one-line message.
        ValueError("operands could not be broadcast together with shapes (2,) (3,)"),
        sqlite3.IntegrityError("UNIQUE constraint failed: patches.photo_id"),
    ],
    ids=["ZeroDivisionError", "IndexError", "numpy-ValueError", "IntegrityError"],
)
def test_an_internal_error_shows_its_traceback_and_the_crash_code(
    tmp_path, capsys, monkeypatch, exc
):
    def broken(*args, **kwargs):
        raise exc

    monkeypatch.setattr("trainkit.synth.write_dataset", broken)
    assert main(_synth_args(tmp_path)) == EXIT_CRASH == 70
    err = capsys.readouterr().err
    assert "Traceback (most recent call last)" in err and type(exc).__name__ in err
    assert err.strip().splitlines()[-1] == (
        f"trainkit: this is a bug in trainkit ({type(exc).__name__}); please report it with "
        "the traceback above"
    )


def test_a_crash_outside_the_library_call_is_still_a_crash(tmp_path, capsys, monkeypatch):
    # evaluate prints its tables after the library call, outside its user_errors block.
    exp = tmp_path / "exp"
    exp.mkdir()
    monkeypatch.setattr("trainkit.judging.evaluation.evaluate_experiment", lambda *a, **k: {})
    monkeypatch.setattr("trainkit.cli.evaluate.print_evaluation", lambda *a: [][1])
    assert main(["evaluate", str(exp)]) == EXIT_CRASH
    err = capsys.readouterr().err
    assert "Traceback" in err and "IndexError" in err and "this is a bug in trainkit" in err


def test_a_user_error_is_exactly_one_line_and_exit_2(tmp_path, capsys):
    assert main(["split", str(tmp_path)]) == EXIT_USAGE == 2
    err = capsys.readouterr().err
    assert len(err.splitlines()) == 1 and err.startswith("trainkit: ")
    assert "not a trainkit workspace" in err


@pytest.mark.parametrize(
    "args,expect",
    [
        (["synth", "OUT", "--size", "20x20"], "SynthOptions.height: expected an int >= 32"),
        (["synth", "OUT", "--size", "64x64", "--tile-px", "128"], "expected tile_px in 1..64"),
        (["synth", "OUT", "--classes", "nope.yaml"], "neither a built-in"),
        (["tile", "PHOTOS", "-w", "OUT", "--group-pattern", "("], "not a valid regular expr"),
    ],
)
def test_mistakes_that_reach_the_library_stay_one_line(tmp_path, capsys, args, expect):
    """Errors raised by library checks of a user's values are TrainkitErrors, not crashes."""
    photos = tmp_path / "photos"
    photos.mkdir()
    from PIL import Image

    Image.new("RGB", (64, 64)).save(photos / "a.png")
    args = [
        str(tmp_path / "o") if a == "OUT" else str(photos) if a == "PHOTOS" else a for a in args
    ]
    assert main(args) == EXIT_USAGE
    err = capsys.readouterr().err
    assert len(err.splitlines()) == 1 and err.startswith("trainkit: ") and expect in err


def test_a_usage_error_is_one_trainkit_line_with_where_help_is(capsys):
    assert main(["tile", "--no-such-option"]) == EXIT_USAGE
    (line,) = capsys.readouterr().err.splitlines()  # click's own form is three lines
    assert line.startswith("trainkit: no such option") and "--no-such-option" in line
    assert line.endswith("; see trainkit tile --help")
    assert main(["split"]) == EXIT_USAGE
    assert capsys.readouterr().err.splitlines() == [
        "trainkit: missing argument 'WORKSPACE'; see trainkit split --help"
    ]


def test_an_os_error_names_the_file_and_says_the_disk_is_full(tmp_path, capsys, monkeypatch):
    def full(*args, **kwargs):
        raise OSError(errno.ENOSPC, "No space left on device", str(tmp_path / "s" / "x.jpg"))

    monkeypatch.setattr("trainkit.synth.write_dataset", full)
    assert main(_synth_args(tmp_path)) == EXIT_USAGE
    err = capsys.readouterr().err
    assert err.splitlines() == [
        f"trainkit: {tmp_path / 's' / 'x.jpg'}: No space left on device (the disk is full: "
        "free some space and run the same command again)"
    ]


def test_ctrl_c_exits_with_the_interrupted_code(tmp_path, capsys, monkeypatch):
    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr("trainkit.synth.write_dataset", interrupted)
    assert main(_synth_args(tmp_path)) == EXIT_INTERRUPTED == 130
    assert capsys.readouterr().err.strip().splitlines()[-1].startswith("trainkit: interrupted")


def test_exit_codes_are_documented_in_help_and_readme(capsys):
    assert main(["--help"]) == 0
    out = capsys.readouterr().out
    text = README.read_text(encoding="utf-8")
    section = text[text.index("## Exit codes") :]
    section = section[: section.index("\n## ", 4)]
    for code in EXIT_CODES:
        assert re.search(rf"^\s+{code}\s+\S", out, re.M), f"--help lacks exit code {code}"
        assert f"**{code}**" in section, f"README lacks exit code {code}"


def test_data_no_metric_can_use_is_one_line_not_a_bug(tmp_path, capsys, monkeypatch):
    # A validation set of crack patches only, reaching a false-alarm threshold inside a
    # command: the user's data cause it, so it is a MetricsError (a TrainkitError), one line.
    from trainkit import metrics as M

    def evaluate_on_cracks_only(*args, **kwargs):
        M.threshold_for_false_alarms([1, 1, 1], [0.2, 0.6, 0.9], max_false_alarm_rate=0.05)

    exp = tmp_path / "exp"
    exp.mkdir()
    monkeypatch.setattr("trainkit.judging.evaluation.evaluate_experiment", evaluate_on_cracks_only)
    assert main(["evaluate", str(exp)]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert len(err.splitlines()) == 1 and "at least one non-crack patch" in err
    assert issubclass(M.MetricsError, TrainkitError)
    with pytest.raises(M.MetricsError, match="at least one crack patch"):
        M.threshold_for_recall([0, 0], [0.1, 0.5], target_recall=0.9)
    with pytest.raises(M.MetricsError, match="at least one crack patch"):
        M.weighted_thresholds([0, 0], [0.1, 0.5], [1.0, 2.0], target_recall=0.9)
    with pytest.raises(M.MetricsError, match="at least one sample"):
        M.expected_calibration_error([], [], n_bins=10)


def test_a_job_threshold_skips_data_it_cannot_use_but_not_a_bug():
    # The job's validation cells hold no crack: the split's threshold stands. Weights of the
    # wrong length are the kit's own mistake and must not be hidden the same way.
    import numpy as np

    from trainkit.judging.scoring import Scored, threshold_for_job_too

    logits = np.array([[2.0, 0.0], [1.5, 0.0], [3.0, 0.0]])
    probs = np.exp(logits) / np.exp(logits).sum(1, keepdims=True)
    job = Scored(logits=logits, probs=probs, labels=np.array([0, 0, 0]))
    kept = threshold_for_job_too(0.4, "split", job, np.ones(3), target_recall=0.9)
    assert kept == (0.4, "split")
    with pytest.raises(ValueError, match="positive finite weights") as info:
        threshold_for_job_too(0.4, "split", job, np.ones(2), target_recall=0.9)
    assert not isinstance(info.value, TrainkitError)
