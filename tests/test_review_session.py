"""A real `trainkit review` session driven through a pseudo-terminal (pexpect)."""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pexpect
from _helpers import make_ws

from trainkit.core.taxonomy import load_class_set
from trainkit.store.pixels import PatchPixels
from trainkit.store.workspace import Workspace

TIMEOUT = 20


def lined(i: int, c: int) -> np.ndarray:
    """Crop c of the workspaces here: grey noise (seeded by c), a dark vertical line when c is odd."""
    img = np.clip(150 + 10 * np.random.default_rng(c).standard_normal((32, 32, 3)), 0, 255)
    img = img.astype(np.uint8)
    if c % 2:
        img[:, 16] = 30
    return img


def spawn(ws: Workspace, *args: str, rows: int = 45, cols: int = 100):
    env = dict(os.environ, TERM="xterm-256color", COLORTERM="truecolor", OMP_NUM_THREADS="1")
    for var in ("NO_COLOR", "COLUMNS", "LINES"):  # rich prefers these to the pty size
        env.pop(var, None)
    return pexpect.spawn(
        sys.executable,
        ["-m", "trainkit", "review", str(ws.root), *args],
        env=env,
        dimensions=(rows, cols),
        timeout=TIMEOUT,
        encoding="utf-8",
    )


def shown(child, patch_id: int, done: int, remaining: int) -> None:
    """Wait for the screen showing this patch with this progress."""
    child.expect(rf"done {done} \| remaining {remaining} \|")
    child.expect(rf"patch {patch_id} ")


def test_label_undo_skip_quit_and_resume(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 6, crop=lined)
    child = spawn(ws, "--reviewer", "ana")
    shown(child, 1, 0, 6)
    child.expect("0 none  1 horizontal  2 diagonal_rising  3 vertical")  # keys shown on screen
    child.send("0")  # patch 1: none
    shown(child, 2, 1, 5)
    child.expect(r"orientation: 90 deg -> vertical")  # the drawn vertical line
    child.send("4")  # patch 2: a slip...
    shown(child, 3, 2, 4)
    child.send("u")  # ...undone at once
    shown(child, 2, 1, 5)
    child.expect("undone: patch 2 again")
    child.send("3")  # patch 2: vertical
    shown(child, 3, 2, 4)
    child.send("s")  # patch 3 skipped: to the end of the queue
    shown(child, 4, 2, 4)
    child.send("x")  # patch 4: unsure
    shown(child, 5, 3, 3)
    child.send("?")
    child.expect("u       undo the last answer or skip")
    child.send(" ")
    shown(child, 5, 3, 3)
    child.send("q")
    child.expect(r"ana: 3 labels this session .* 3 left; run the same command to resume")
    child.expect(pexpect.EOF)
    child.close()
    assert child.exitstatus == 0

    events = [(e["patch_id"], e["label"], e["reviewer"], e["origin"]) for e in ws.label_events()]
    assert events == [
        (1, "none", "ana", "reviewer"),
        (2, "vertical", "ana", "reviewer"),
        (4, None, "ana", "reviewer"),
    ]
    assert [(e["patch_id"], e["label"]) for e in ws.undone_events()] == [(2, "diagonal_falling")]
    cur = {r.id: (r.labelled, r.label) for r in ws.patches()}
    assert cur == {
        1: (True, "none"),
        2: (True, "vertical"),
        3: (False, None),
        4: (True, None),
        5: (False, None),
        6: (False, None),
    }

    # resume: starts at patch 5; the skipped patch 3 comes last
    child = spawn(ws, "--reviewer", "ana")
    shown(child, 5, 0, 3)
    child.send("0")
    shown(child, 6, 1, 2)
    child.send("3")
    shown(child, 3, 2, 1)
    child.send("0")
    child.expect("queue finished")
    child.expect(pexpect.EOF)
    child.close()
    assert [r.label for r in ws.patches()] == ["none", "vertical", "none", None, "none", "vertical"]
    assert len(ws.label_events()) == 6


def test_contact_sheet_answers_and_small_terminal_fallback(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 8, crop=lined)
    child = spawn(ws, "--reviewer", "ben", "--grid", "3x2", rows=20, cols=50)
    child.expect("smaller than 60x34: using contact-sheet mode")
    child.expect(r"\(6 patches, numbered 1-6\)")
    child.expect("answer> ")
    assert (ws.root / "review" / "sheet-ben.png").is_file()
    child.sendline("all none except 4 2=3 6=vertical")
    child.expect(r"\(3 patches, numbered 1-3\)")  # patch 4 and the last two remain
    child.expect("saved 5 labels")
    child.sendline("all zz")
    child.expect("unknown class 'zz'")
    child.sendline("u")
    child.expect("undone: the last sheet answer")
    child.sendline("q")
    child.expect(pexpect.EOF)
    child.close()
    assert ws.label_events() == []
    child = spawn(ws, "--reviewer", "ben", "--sheet")
    child.expect("answer> ")
    child.sendline("all 0 2=v 4=v 6=v 8=v")
    child.expect("queue finished")
    child.expect(pexpect.EOF)
    child.close()
    assert [r.label for r in ws.patches()] == ["none", "vertical"] * 4
    assert {e["reviewer"] for e in ws.label_events()} == {"ben"}


def test_not_a_workspace_is_one_clear_line(tmp_path):
    child = spawn(Workspace(tmp_path / "nowhere"))
    child.expect(r"trainkit: .*nowhere is not a trainkit workspace")
    child.expect(pexpect.EOF)
    child.close()
    assert child.exitstatus == 2


def test_model_queue_through_the_command(demo_run, tmp_path):
    """`trainkit review --model` labels the least certain patches first; the order is checked
    against margins computed here directly with ONNX Runtime (top-1 minus top-2 probability)."""
    import onnxruntime as ort
    from PIL import Image as PILImage

    from trainkit.intake.tiling import tile_into_workspace
    from trainkit.synth import SynthOptions, generate_photo

    out, _ = demo_run
    photos = tmp_path / "photos"
    photos.mkdir()
    for i, scene in enumerate(("single", "map", "none")):
        img = generate_photo(7000 + i, SynthOptions(height=384, width=512, scene=scene)).image
        PILImage.fromarray(img).save(photos / f"p{i}.png")
    ws = Workspace.create(tmp_path / "ws", class_set=load_class_set("orientation"), tile_px=128)
    tile_into_workspace(sorted(photos.iterdir()), ws, workers=1)
    env = dict(os.environ, OMP_NUM_THREADS="1")
    res = subprocess.run(
        [
            sys.executable,
            "-m",
            "trainkit",
            "review",
            str(ws.root),
            "--reviewer",
            "t",
            "--sheet",
            "--model",
            str(out / "model.onnx"),
        ],
        input="all none\nq\n",
        capture_output=True,
        text=True,
        env=env,
        timeout=120,
    )
    assert res.returncode == 0, res.stdout + res.stderr
    recs = ws.patches()
    labelled = {r.id for r in recs if r.labelled}
    assert len(labelled) == 24  # one 6 x 4 sheet
    sess = ort.InferenceSession(str(out / "model.onnx"), providers=["CPUExecutionProvider"])
    imgs = PatchPixels(ws).get(recs, store=False)
    probs = sess.run(None, {"image": imgs})[0]
    top2 = np.sort(probs, axis=1)[:, -2:]
    margin = top2[:, 1] - top2[:, 0]
    order = np.argsort(margin, kind="stable")
    expected = {recs[i].id for i in order[:24]}
    # ties at the cut could swap a patch; margins are continuous, so demand equality
    assert labelled == expected


def test_session_killed_between_keystrokes_loses_nothing_finished(tmp_path):
    """SIGKILL after three answers: the three events are stored, and a new session resumes at
    the fourth patch with the right progress."""
    import signal

    ws = make_ws(tmp_path / "ws", 1, 6, crop=lined)
    child = spawn(ws, "--reviewer", "ana")
    shown(child, 1, 0, 6)
    for pid, key in ((1, "0"), (2, "3"), (3, "0")):
        child.send(key)
        shown(child, pid + 1, pid, 6 - pid)
    child.kill(signal.SIGKILL)
    child.wait()
    child.close()  # not left to ptyprocess's __del__ (it sleeps and signals from the collector)
    hist = {r.id: [e["label"] for e in ws.label_history(r.id)] for r in ws.patches()}
    assert hist == {1: ["none"], 2: ["vertical"], 3: ["none"], 4: [], 5: [], 6: []}
    again = spawn(ws, "--reviewer", "ana")
    shown(again, 4, 0, 3)  # resumes with the unlabelled patches only
    again.send("q")
    again.expect(pexpect.EOF)
    again.close()


def _labels_in_queue_order(ws: Workspace) -> list[tuple[int, str | None]]:
    return [(r.id, r.label if r.labelled else "-") for r in ws.patches()]


def test_keys_typed_ahead_in_one_burst_are_all_applied_in_order(tmp_path):
    """Issue 14: `003u15q` written in ONE burst, before the first screen is even drawn. Every
    key is applied in order (the `u` takes back the `3`) and the typed-ahead `q` still quits."""
    ws = make_ws(tmp_path / "ws", 1, 6, crop=lined)
    child = spawn(ws, "--reviewer", "ana")
    child.send("003u15q")  # one write, straight after start: typed faster than any redraw
    child.expect(r"ana: 4 labels this session .* 2 left; run the same command to resume")
    child.expect(pexpect.EOF)
    child.close()
    assert child.exitstatus == 0
    assert _labels_in_queue_order(ws) == [
        (1, "none"),
        (2, "none"),
        (3, "horizontal"),
        (4, "map"),
        (5, "-"),
        (6, "-"),
    ]
    assert [(e["patch_id"], e["label"]) for e in ws.undone_events()] == [(3, "vertical")]


def test_keys_typed_ahead_while_a_screen_is_drawn(tmp_path):
    """The same keys, one write each after the first screen, with pauses shorter than a redraw
    may take: the result is the same."""
    import time

    ws = make_ws(tmp_path / "ws", 1, 6, crop=lined)
    child = spawn(ws, "--reviewer", "ana")
    shown(child, 1, 0, 6)
    for key in "003u15q":
        child.send(key)
        time.sleep(0.02)
    child.expect(r"ana: 4 labels this session .* 2 left; run the same command to resume")
    child.expect(pexpect.EOF)
    child.close()
    assert child.exitstatus == 0
    assert _labels_in_queue_order(ws) == [
        (1, "none"),
        (2, "none"),
        (3, "horizontal"),
        (4, "map"),
        (5, "-"),
        (6, "-"),
    ]


def test_ctrl_c_saves_and_exits_with_the_interrupted_code(tmp_path):
    """Ctrl-C in key mode is not a normal quit: answers are kept, the exit code is 130."""
    ws = make_ws(tmp_path / "ws", 1, 4, crop=lined)
    child = spawn(ws, "--reviewer", "ana")
    shown(child, 1, 0, 4)
    child.send("3")
    shown(child, 2, 1, 3)
    child.sendcontrol("c")
    child.expect(r"ana: 1 labels this session .* interrupted, 3 left; run the same command")
    child.expect(pexpect.EOF)
    child.close()
    assert child.exitstatus == 130
    assert [(e["patch_id"], e["label"]) for e in ws.label_events()] == [(1, "vertical")]
