"""Adapting a screener to a job (trainkit.learning.adapt, `trainkit train --from`) and the
honest path after it: the frames it learned from are kept out of later job checks."""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from test_jobs_workflow import answer_from_truth, make_job, new_ws, scanned  # noqa: F401

from trainkit.core.experiment import Experiment
from trainkit.jobs.sample import SampleError, sample_scan
from trainkit.jobs.verify import VerifyError, verify_scan
from trainkit.learning.adapt import (
    ADAPT_DEFAULTS,
    AdaptError,
    adapt_recipe,
    plan_adaptation,
    replay_set,
)
from trainkit.learning.data import PatchSet


def _sha(path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_job_cells_are_split_by_frame_and_their_frames_recorded(scanned, tmp_path):  # noqa: F811
    out, truth = scanned
    ws = new_ws(tmp_path / "ws")
    sample_scan(out, ws, cells=90, seed=1, job="deck")
    answer_from_truth(ws, truth)
    unsure = [c["patch_id"] for c in ws.job_cells("deck")][:4]
    ws.add_labels([(i, None) for i in unsure], reviewer="sim")  # answered "unsure"
    plan = plan_adaptation(ws, tmp_path / "src", None, seed=0)
    cells = {c["patch_id"]: c for c in ws.job_cells("deck")}
    train, val = plan.cells["train"], plan.cells["val"]
    # No frame gives cells to both sides; every answered cell is on one side, unsure ones on none.
    assert {cells[i]["frame_sha256"] for i in train}.isdisjoint(
        {cells[i]["frame_sha256"] for i in val}
    )
    assert sorted(train + val) == sorted(set(cells) - set(unsure))
    assert plan.left_out == {"unsure": 4, "unanswered": 0}
    # The frames are recorded by content: SHA-256 of the frame files (hashlib).
    frames = {c["frame"] for c in cells.values()}
    assert {f["sha256"] for f in plan.frames} == {_sha(Path(f)) for f in frames}
    n_val_frames = sum(f["subset"] == "val" for f in plan.frames)
    # scikit-learn's GroupShuffleSplit puts ceil(0.25 * groups) groups on the test side.
    assert n_val_frames == int(np.ceil(0.25 * len(plan.frames)))
    assert plan_adaptation(ws, tmp_path / "src", ["deck"], seed=0).cells == plan.cells


def test_plans_that_cannot_adapt_are_refused(scanned, tmp_path):  # noqa: F811
    out, truth = scanned
    ws = new_ws(tmp_path / "ws")
    with pytest.raises(AdaptError, match="no answered cell"):
        plan_adaptation(ws, tmp_path, None, seed=0)
    sample_scan(out, ws, cells=30, seed=1, job="deck")
    with pytest.raises(AdaptError, match="no job 'pier'.*deck"):
        plan_adaptation(ws, tmp_path, ["pier"], seed=0)
    ws.add_labels([(c["patch_id"], "none") for c in ws.job_cells("deck")], reviewer="sim")
    with pytest.raises(AdaptError, match="all clean"):
        plan_adaptation(ws, tmp_path, None, seed=0)


def test_replay_keeps_every_job_cell_and_a_seeded_share_of_the_source():
    def ps(n, start):
        ids = np.arange(start, start + n)
        return PatchSet(
            np.zeros((n, 4, 4, 3), np.uint8), ids % 2, ids, [f"p{i}" for i in ids],
            ["g"] * n, np.full(n, np.nan),
        )  # fmt: skip

    source, job = ps(50, 0), ps(7, 1000)
    mixed = replay_set(source, job, ratio=3, seed=5)
    assert len(mixed) == 21 + 7 and set(job.patch_ids) <= set(mixed.patch_ids)
    assert np.array_equal(mixed.patch_ids, replay_set(source, job, ratio=3, seed=5).patch_ids)
    assert len(replay_set(source, job, ratio=10, seed=5)) == 50 + 7  # at most all of them


def test_adapt_recipe_keeps_the_network_and_shortens_the_run(tmp_path):
    with pytest.raises(AdaptError, match="not a trained experiment"):
        adapt_recipe(tmp_path)


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("epochs: [1\n", "recipe.yaml"),  # not YAML
        ("- 1\n- 2\n", "expected a mapping of settings"),
        ("batch_size: 0\n", "batch_size"),
    ],
)
def test_a_damaged_source_recipe_is_one_config_error_not_a_crash(tmp_path, text, match):
    """train --from reads the source's recipe.yaml as any recipe file: a damaged one is a
    ConfigError (one line in the CLI), never a YAML or pydantic traceback (exit 70)."""
    from trainkit.core.errors import TrainkitError
    from trainkit.core.experiment import Experiment

    folder = Experiment(tmp_path)
    folder.checkpoint_path.write_bytes(b"x")
    folder.recipe_path.write_text(text, encoding="utf-8")
    with pytest.raises(TrainkitError, match=match):
        adapt_recipe(tmp_path)


# ----- the whole loop on the demo's model ------------------------------------------------


def _frames(folder, seeds):
    from trainkit.synth import SynthOptions, generate_photo

    folder.mkdir(parents=True, exist_ok=True)
    cracks = {}
    for seed in seeds:
        photo = generate_photo(seed, SynthOptions(width=512, height=384))
        Image.fromarray(photo.image).save(folder / f"frame-{seed}.png")
        cracks[f"frame-{seed}.png"] = photo.cracks
    return cracks


def _answer(ws, cracks):
    from trainkit.synth import derive_patch_label

    cs = ws.class_set
    items = []
    for r in ws.patches():
        if r.job is not None and not r.labelled:
            t = derive_patch_label(cracks[r.photo.rsplit("/", 1)[1]], tuple(r.box), cs)
            items.append((r.id, None if t.label is None else cs.names[t.label]))
    ws.add_labels(items, reviewer="sim")


def test_adapt_export_scan_and_the_honest_path(demo_run, tmp_path):
    """train --from on a job's answered cells; the adapted model's scans keep the frames it
    learned from out of new samples, and verify refuses a sample made of them."""
    from click.testing import CliRunner

    from trainkit.cli import cli
    from trainkit.export.onnx_file import export_experiment
    from trainkit.judging.evaluation import evaluate_experiment
    from trainkit.learning.adapt import load_subset
    from trainkit.learning.network import load_checkpoint
    from trainkit.screener.scan import scan_frames
    from trainkit.store.workspace import Workspace

    demo, _ = demo_run
    exp = tmp_path / "exp"
    shutil.copytree(demo, exp, ignore=shutil.ignore_patterns("workspace", "scan*", "frames"))
    shutil.copytree(demo / "workspace", tmp_path / "ws")
    ws = Workspace.open(tmp_path / "ws")
    cracks = _frames(tmp_path / "job", (51, 52, 53, 54))
    scan_frames(exp / "model.onnx", [tmp_path / "job"], tmp_path / "scan1")
    sample_scan(tmp_path / "scan1", ws, cells=40, seed=1, job="deck")
    _answer(ws, cracks)

    run = CliRunner().invoke
    args = ["train", str(ws.root), "--from", str(exp), "--out", str(tmp_path / "exp2")]
    r = run(cli, [*args, "--config", "demo"])
    assert r.exit_code == 2 and "exclude each other" in r.output
    r = run(cli, [*args, "--backbone", "tiny_cnn"])
    assert r.exit_code == 2 and "cannot be changed when adapting" in r.output
    r = run(cli, ["-q", *args, "--epochs", "1"])
    assert r.exit_code == 0, r.output
    exp2 = Experiment(tmp_path / "exp2")
    learned = exp2.learned_frames()
    sampled = {c["frame"] for c in ws.job_cells("deck")}
    assert learned == {_sha(Path(f)): f for f in sampled}
    prov = exp2.read_provenance()
    assert prov["adaptation"]["source"] == str(exp.resolve())
    assert "adapted_from" in exp2.status()
    _, ckpt, cs = load_checkpoint(exp2.path)
    assert ckpt["weights"]["adapted_from"] == str(exp.resolve())
    assert ckpt["config"]["head_epochs"] == ADAPT_DEFAULTS["head_epochs"]
    # The threshold of the adapted model is chosen on validation with the job's val cells in it.
    val = load_subset(ws, "val", cs, ckpt["experiment"])
    n_val = len(prov["adaptation"]["cells"]["val"])
    assert n_val > 0 and len(val) == prov["validation_patches"] == n_val + sum(
        1 for p in ws.patches() if p.subset == "val" and p.label is not None
    )
    metrics = evaluate_experiment(exp2.path, split="test", max_false_alarms=0.05)
    # The budget holds on the job's validation cells too (weighted by inclusion probability).
    assert "job's" in metrics["screening"]["threshold_source"]
    export_experiment(exp2.path)
    assert "**Adapted** from" in exp2.card_path.read_text(encoding="utf-8")

    # Scans by the adapted model record what it learned from; a new sample leaves those out.
    scan_frames(exp2.model_path, [tmp_path / "job"], tmp_path / "scan2")
    assert json.loads((tmp_path / "scan2" / "scan.json").read_text())["learned_frames"] == learned
    with pytest.raises(SampleError, match="learned from"):
        sample_scan(tmp_path / "scan2", ws, cells=10, seed=2, job="again")
    with pytest.raises(VerifyError, match="frames the scan's model learned from"):
        verify_scan(tmp_path / "scan2", ws, job="deck")
    more = _frames(tmp_path / "job", (61,))
    scan_frames(exp2.model_path, [tmp_path / "job"], tmp_path / "scan2")
    s = sample_scan(tmp_path / "scan2", ws, cells=12, seed=2, job="check")
    assert s["frames_learned_from_left_out"] == 4 and s["frames_sampled"] == 1
    assert {c["frame"] for c in ws.job_cells("check")} == {str(tmp_path / "job" / "frame-61.png")}
    _answer(ws, {**cracks, **more})
    v = verify_scan(tmp_path / "scan2", ws, job="check")
    assert v["cells_answered"] > 0 and v["frames_learned_from_left_out"] == 4
    page = Path(v["report"]).read_text(encoding="utf-8")
    assert 'data-metric="frames_learned_from_left_out" data-value="4"' in page
