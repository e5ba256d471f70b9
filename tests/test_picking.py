"""Choosing what to label: the spread rule, greedy k-center, margins, the train-only rule, records."""

from __future__ import annotations

import itertools
import json
import shutil

import numpy as np
import pytest
from _helpers import make_ws
from click.testing import CliRunner
from PIL import Image
from scipy.spatial.distance import cdist

from trainkit.cli import main
from trainkit.core.taxonomy import load_class_set
from trainkit.labels.picking import (
    PickError,
    allocate,
    choose_guided,
    covering_radius,
    greedy_k_center,
    interleave,
    pick_patches,
    scale_bin,
)
from trainkit.labels.review import build_queue, margins
from trainkit.labels.review_run import ReviewRequest, prepare_session
from trainkit.store.workspace import Workspace, WorkspaceError, job_group

SIZE = 8
#: group -> photos; photo j of a group has scale 0.5 mm/px (even j) or 2 mm/px (odd j)
GROUPS = {"A": 3, "B": 2, "C": 1}
PER_PHOTO = 12


def archive_ws(root, groups=GROUPS, per_photo=PER_PHOTO) -> Workspace:
    """Photos in groups, two scales (patches of 4 and 16 mm), every third patch flagged; each
    patch's pixels are a crop file (as an older kit wrote them), so no photo is needed."""
    ws = Workspace.create(root, class_set=load_class_set("orientation"), tile_px=SIZE)
    rng = np.random.default_rng(0)
    for g, n_photos in groups.items():
        for j in range(n_photos):
            name = f"{g}{j}.jpg"
            patches = []
            for c in range(per_photo):
                rel = f"patches/{name}/c{c:03d}.png"
                (ws.root / rel).parent.mkdir(parents=True, exist_ok=True)
                Image.fromarray(rng.integers(0, 255, (SIZE, SIZE, 3), dtype=np.uint8)).save(
                    ws.root / rel
                )
                patches.append(
                    dict(row=0, col=c, x0=SIZE * c, y0=0, x1=SIZE * c + SIZE, y1=SIZE, crop=rel)
                    | dict(patch_mm=None, focus=50.0, clipped=0.0)
                    | dict(flags="blurred" if c % 3 == 0 else "")
                )
            ws.add_photo_with_patches(
                name=name,
                source_path=f"/x/{name}",
                width=SIZE * per_photo,
                height=SIZE,
                gsd_mm=0.5 if j % 2 == 0 else 2.0,
                group_id=g,
                sha256=f"{g}{j}".ljust(64, "0"),
                patches=patches,
            )
    return ws


def where(ws: Workspace) -> dict[int, tuple[str, str, str]]:
    """Patch id -> (group, photo, scale bin:quality)."""
    out = {}
    for r in ws.patches():
        mm = r.patch_mm if r.patch_mm is not None else (r.box[2] - r.box[0]) * r.gsd_mm
        out[r.id] = (r.group, r.photo, f"{scale_bin(mm)}:{'flagged' if r.flags else 'clean'}")
    return out


def spread_of(values) -> int:
    counts = list(values)
    return max(counts) - min(counts)


# ----- greedy k-center against brute force -----------------------------------------------------


def reference_k_center(x: np.ndarray, k: int, first: int) -> list[int]:
    """Gonzalez's farthest-first traversal as a plain loop over scipy's distance matrix."""
    d = cdist(x, x)
    chosen = [first]
    while len(chosen) < k:
        best, best_d = None, -1.0
        for i in range(len(x)):
            near = min(d[i, c] for c in chosen)
            if near > best_d:  # strictly farther: ties keep the lowest index
                best, best_d = i, near
        chosen.append(best)
    return chosen


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("k", [2, 3, 4])
def test_greedy_k_center_is_within_twice_the_brute_force_optimum(seed, k):
    # Gonzalez, T. F. (1985). Clustering to minimize the maximum intercluster distance.
    # Theoretical Computer Science 38, 293-306: farthest-first traversal is a
    # 2-approximation of the k-center optimum. The optimum here is found by trying every
    # k-subset of 12 points (scipy.spatial.distance.cdist for the distances).
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(12, 2)) * [3.0, 1.0]
    d = cdist(x, x)
    best = min(d[:, list(c)].min(axis=1).max() for c in itertools.combinations(range(len(x)), k))
    for first in (0, 5, 11):
        got = greedy_k_center(x, k, first=first)
        assert got.tolist() == reference_k_center(x, k, first)
        radius = covering_radius(x, got)
        assert radius == pytest.approx(d[:, got].min(axis=1).max())
        assert best - 1e-12 <= radius <= 2 * best + 1e-12


def test_greedy_k_center_on_a_hand_made_line():
    # points on a line at 0, 1, 2, 10, 11: from 0 the farthest is 11, then 2 or 10 are 2 and
    # 1 away from their nearest centres (0, 11) ... 2 is at distance 2, 10 at 1: 2 wins
    x = np.array([[0.0], [1.0], [2.0], [10.0], [11.0]])
    assert greedy_k_center(x, 3, first=0).tolist() == [0, 4, 2]
    assert covering_radius(x, [0, 4, 2]) == 1.0
    with pytest.raises(ValueError, match=r"k must be in \[0, 5\], got 6"):
        greedy_k_center(x, 6)


# ----- margins and the guided choice ----------------------------------------------------------


def test_margins_and_the_guided_choice_by_hand():
    # margin = top-1 minus top-2 probability (Scheffer, Decomain and Wrobel 2001)
    p = np.array(
        [
            [0.90, 0.05, 0.05],  # 0.85
            [0.40, 0.35, 0.25],  # 0.05
            [0.50, 0.30, 0.20],  # 0.20
            [0.34, 0.33, 0.33],  # 0.01
            [0.45, 0.45, 0.10],  # 0.00
            [0.60, 0.10, 0.30],  # 0.30
        ]
    )
    np.testing.assert_allclose(margins(p), [0.85, 0.05, 0.20, 0.01, 0.00, 0.30])
    # features: candidates 4 and 3 (the two least sure) are near-copies, 1 is far away
    feats = np.array([[0, 0], [10, 0], [5, 5], [0.1, 0], [0, 0.1], [9, 9]], dtype=float)
    # uncertain part = the 3 smallest margins: 4 (0.00), 3 (0.01), 1 (0.05); k-center from
    # 4 takes 1 next (distance about 10) instead of the near-copy 3
    order, reasons, scores = choose_guided(p, feats, 2, uncertain=3)
    assert order.tolist() == [4, 1]
    assert reasons == ["uncertain", "diverse"]
    np.testing.assert_allclose(scores, [0.0, 0.05])
    # when the uncertain part is no larger than k, the margin alone decides
    order, reasons, _ = choose_guided(p, feats, 2, uncertain=2)
    assert order.tolist() == [4, 3] and reasons == ["uncertain", "uncertain"]


# ----- the spread rule --------------------------------------------------------------------------


def test_allocate_fills_like_water_and_draws_the_odd_ones_by_seed():
    rng = np.random.default_rng(0)
    # a has room for 1; the other 9 go equally to b and c (4 and 5 in some order)
    out = allocate(10, {"a": 1, "b": 5, "c": 10}, rng)
    assert out["a"] == 1 and sorted([out["b"], out["c"]]) == [4, 5]
    assert allocate(100, {"a": 1, "b": 5}, rng) == {"a": 1, "b": 5}
    assert allocate(0, {"a": 3}, rng) == {"a": 0}
    counts = [allocate(1, {"a": 9, "b": 9}, np.random.default_rng(s))["a"] for s in range(40)]
    assert 0 < sum(counts) < 40  # the odd one goes to either, by the seed
    assert interleave([[1, 2, 3, 4], ["x", "y"]]) == [1, "x", 2, 3, "y", 4]


def test_scale_bins_are_octaves_of_the_patch_width():
    assert scale_bin(4.0) == "4-8 mm" and scale_bin(7.9) == "4-8 mm"
    assert scale_bin(16.0) == "16-32 mm" and scale_bin(0.7) == "0.5-1 mm"
    assert scale_bin(None) == "unknown" == scale_bin(float("nan"))


def test_a_spread_pick_gives_every_group_its_quota_then_scales_photos_and_quality(tmp_path):
    ws = archive_ws(tmp_path / "ws")
    at = where(ws)
    res = pick_patches(ws, 9, seed=1, cache=False)
    picked = [p["patch_id"] for p in ws.picked_patches()]
    assert len(picked) == 9 == res["picked"] and res["by_reason"]["spread"] == 9
    assert {g: sum(at[i][0] == g for i in picked) for g in GROUPS} == {"A": 3, "B": 3, "C": 3}
    assert {g: row["picked"] for g, row in res["groups"].items()} == {"A": 3, "B": 3, "C": 3}
    # group C has 12 patches: 40 leaves C with all 12 and A, B with 14 each
    ws2 = archive_ws(tmp_path / "ws2")
    pick_patches(ws2, 40, seed=3, cache=False)
    picked = [p["patch_id"] for p in ws2.picked_patches()]
    per_group = {g: sum(at[i][0] == g for i in picked) for g in GROUPS}
    assert per_group == {"A": 14, "B": 14, "C": 12}
    # within A: its two scale bins (photos A0, A2 at 4 mm and A1 at 16 mm) get 7 each ...
    a = [at[i] for i in picked if at[i][0] == "A"]
    per_scale = {s: sum(x[2].startswith(s) for x in a) for s in ("4-8 mm", "16-32 mm")}
    assert per_scale == {"4-8 mm": 7, "16-32 mm": 7}
    # ... A0 and A2 share their bin's 7 within one, and every photo's 4 flagged and 8 clean
    # patches share its quota within one (as far as the 4 flagged go)
    assert spread_of([sum(x[1] == p for x in a) for p in ("A0.jpg", "A2.jpg")]) <= 1
    for photo in {x[1] for x in (at[i] for i in picked)}:
        mine = [at[i][2].endswith("flagged") for i in picked if at[i][1] == photo]
        flagged, clean = sum(mine), len(mine) - sum(mine)
        assert abs(flagged - clean) <= 1 or flagged == 4, (photo, flagged, clean)


def test_the_same_seed_gives_the_same_pick_and_another_seed_another(tmp_path):
    ws = archive_ws(tmp_path / "a")
    for name in ("b", "c"):
        shutil.copytree(tmp_path / "a", tmp_path / name)
    runs = {}
    for name, seed in (("a", 7), ("b", 7), ("c", 8)):
        pick_patches(Workspace.open(tmp_path / name), 10, seed=seed, cache=False)
        runs[name] = [
            (p["patch_id"], p["rank"]) for p in Workspace.open(tmp_path / name).picked_patches()
        ]
    assert runs["a"] == runs["b"]
    assert {i for i, _ in runs["a"]} != {i for i, _ in runs["c"]}
    assert ws.picks()[0]["seed"] == 7


def test_labelled_skipped_and_job_patches_are_never_picked(tmp_path):
    ws = archive_ws(tmp_path / "ws")
    recs = ws.patches()
    labelled = {recs[0].id, recs[13].id}
    ws.add_labels([(recs[0].id, "none"), (recs[13].id, None)], reviewer="ana")  # unsure too
    skipped = {recs[5].id}
    jobbed = {recs[20].id}
    with ws.connect() as con:
        con.execute("UPDATE patches SET review_skip = 1 WHERE id = ?", (recs[5].id,))
        con.execute(
            "INSERT INTO jobs(name, scan, threshold, design, created_at) VALUES ('j', 's', 0.5, '{}', 0)"
        )
        con.execute(
            "INSERT INTO job_cells(patch_id, job, frame, stratum, inclusion_probability,"
            " screening_probability) VALUES (?, 'j', 'f', 'flagged', 1, 0.9)",
            (recs[20].id,),
        )
    ws.add_photo_with_patches(  # a job frame left without its job record (an older kit)
        name="frame.jpg", source_path="/x/frame.jpg", width=3 * SIZE, height=SIZE, gsd_mm=None,
        group_id=job_group("j"), sha256="f" * 64,
        patches=[dict(row=0, col=c, x0=SIZE * c, y0=0, x1=SIZE * (c + 1), y1=SIZE, crop="",
                      patch_mm=None, focus=1.0, clipped=0.0) for c in range(3)],
    )  # fmt: skip
    of_job_group = {r.id for r in ws.patches() if r.group.startswith("job:")}
    res = pick_patches(ws, 10_000, seed=0, cache=False)
    picked = {p["patch_id"] for p in ws.picked_patches()}
    assert not picked & (labelled | skipped | jobbed | of_job_group)
    everything = {r.id for r in recs}
    assert picked == everything - labelled - skipped - jobbed
    assert res["picked"] == len(picked) and "only" in res["note"]
    with pytest.raises(PickError, match="holds no patch to pick"):
        pick_patches(ws, 1, seed=0, cache=False)


def test_a_second_pick_adds_and_never_repeats(tmp_path):
    ws = archive_ws(tmp_path / "ws")
    first = pick_patches(ws, 10, seed=1, cache=False)
    before = ws.picked_patches()
    second = pick_patches(ws, 10, seed=1, cache=False)  # the same seed: still new patches
    after = ws.picked_patches()
    assert (first["pick"], second["pick"]) == (1, 2)
    assert after[:10] == before  # the first pick is kept as it was
    ids = [p["patch_id"] for p in after]
    assert len(ids) == len(set(ids)) == 20
    assert [p["pick"] for p in ws.picks()] == [1, 2]
    assert [p["rank"] for p in after if p["pick"] == 2] == list(range(1, 11))
    # recording a patch twice is refused and leaves nothing behind
    with pytest.raises(WorkspaceError, match="1 of the 1 patches drawn can no longer be picked"):
        ws.record_pick([{"patch_id": ids[0], "reason": "spread"}], seed=0, model=None, design={})
    assert len(ws.picks()) == 2


# ----- the train-only rule ---------------------------------------------------------------------


class FakeScorer:
    """A stand-in model: probabilities from each patch's mean grey, features its RGB means."""

    input_px = SIZE
    class_names = tuple(load_class_set("orientation").names)
    features_kind = "penultimate"
    source = "fake-model"

    def __init__(self):
        self.scored = 0

    def __call__(self, images):
        self.scored += len(images)
        m = images.reshape(len(images), -1, 3).mean(axis=1) / 255.0
        top = 0.5 + 0.5 * m[:, 0]
        p = np.zeros((len(images), 6))
        p[:, 0] = top
        p[:, 1] = 1 - top
        return p, m


def test_model_guided_picks_come_only_from_train_groups(tmp_path):
    ws = archive_ws(tmp_path / "ws", groups={"A": 2, "B": 2, "C": 2, "D": 2})
    by_group: dict[str, list[int]] = {}
    for r in ws.patches():
        by_group.setdefault(r.group, []).append(r.id)
    # the split: A in train, B in test, C in val, D in no split
    ws.set_split({by_group["A"][0]: "train", by_group["B"][0]: "test", by_group["C"][0]: "val"}, {})
    scorer = FakeScorer()
    res = pick_patches(ws, 12, seed=2, scorer=scorer, pool=3, cache=False)
    group_of = {i: g for g, ids in by_group.items() for i in ids}
    rows = ws.picked_patches()
    assert {g: sum(group_of[p["patch_id"]] == g for p in rows) for g in "ABCD"} == dict.fromkeys(
        "ABCD", 3
    )
    for p in rows:
        guided = p["reason"] in ("uncertain", "diverse")
        assert guided == (group_of[p["patch_id"]] == "A"), p
        assert (p["score"] is not None) == guided
    assert [g for g, row in res["groups"].items() if row["guided"]] == ["A"]
    assert scorer.scored == res["pool_size"] == 9  # a pool of 3 x A's quota, from A only
    assert res["by_reason"] == {"spread": 9, "uncertain": 1, "diverse": 2}
    assert "not in the split's train part" in res["note"]
    # without a split, a model changes nothing: every pick is spread
    ws2 = archive_ws(tmp_path / "ws2", groups={"A": 2, "B": 2})
    res2 = pick_patches(ws2, 6, seed=2, scorer=FakeScorer(), cache=False)
    assert res2["by_reason"]["spread"] == 6 and res2["pool_size"] == 0


def test_a_model_of_other_classes_is_refused(tmp_path):
    ws = archive_ws(tmp_path / "ws", groups={"A": 1})
    scorer = FakeScorer()
    scorer.class_names = ("none", "crack")
    with pytest.raises(PickError, match=r"predicts classes \['none', 'crack'\]"):
        pick_patches(ws, 3, seed=0, scorer=scorer)


# ----- review shows the picks ---------------------------------------------------------------------


def test_queue_order_job_cells_then_picks_then_the_rest_and_skips_last(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 6, size=SIZE)
    with ws.connect() as con:
        con.execute(
            "INSERT INTO jobs(name, scan, threshold, design, created_at) VALUES ('j', 's', 0.5, '{}', 0)"
        )
        con.execute(
            "INSERT INTO job_cells(patch_id, job, frame, stratum, inclusion_probability,"
            " screening_probability) VALUES (6, 'j', 'f', 'flagged', 1, 0.9)"
        )
    recs = ws.patches()
    assert build_queue(recs, reviewer="a") == [6, 1, 2, 3, 4, 5]
    assert build_queue(recs, reviewer="a", picks=[5, 3]) == [6, 5, 3, 1, 2, 4]
    assert build_queue(recs, reviewer="a", picks=[5, 3], skipped={5: 1.0}) == [6, 3, 1, 2, 4, 5]
    assert build_queue(recs, reviewer="a", queue="picked", picks=[5, 3]) == [5, 3]
    assert build_queue(recs, reviewer="a", queue="picked") == []
    # with a model, the rest is ordered by margin, the picks still lead in their own order
    probs = {i: np.array([0.5 + 0.05 * i, 0.5 - 0.05 * i, 0, 0, 0, 0]) for i in range(1, 7)}
    assert build_queue(recs, reviewer="a", picks=[3, 5], probabilities=probs) == [6, 3, 5, 1, 2, 4]


def test_review_puts_unanswered_picks_first_and_the_picked_queue_holds_only_them(tmp_path):
    ws = archive_ws(tmp_path / "ws", groups={"A": 1, "B": 1})
    pick_patches(ws, 4, seed=5, cache=False)
    picks = [p["patch_id"] for p in ws.picked_patches()]
    ws.add_labels([(picks[1], "none")], reviewer="ben")
    left = [picks[0], *picks[2:]]
    q = prepare_session(ws, ReviewRequest(reviewer="ana", queue="picked")).queue
    assert q == left
    q = prepare_session(ws, ReviewRequest(reviewer="ana")).queue
    assert q[:3] == left and len(q) == 2 * PER_PHOTO - 1  # all unlabelled, picks first
    assert sorted(q[3:]) == q[3:]  # then the rest in photo order, as before


# ----- the command -------------------------------------------------------------------------------


def test_pick_command_end_to_end(tmp_path, capsys):
    ws = make_ws(tmp_path / "ws", 3, 4, size=SIZE)
    assert main(["pick", str(ws.root), "--patches", "5", "--seed", "1", "--json"]) == 0
    res = json.loads(capsys.readouterr().out)
    assert res["picked"] == 5 and res["by_reason"]["spread"] == 5 and res["seed"] == 1
    assert {g: row["picked"] for g, row in res["groups"].items()} in (
        {"g0": 2, "g1": 2, "g2": 1},
        {"g0": 2, "g1": 1, "g2": 2},
        {"g0": 1, "g1": 2, "g2": 2},
    )
    assert res["crops"]["store"] is not None
    out = CliRunner().invoke(
        __import__("trainkit.cli", fromlist=["cli"]).cli,
        ["pick", str(ws.root), "--patches", "20", "--seed", "2"],
    )
    assert out.exit_code == 0, out.output
    assert "pick 2 of" in out.output and "7 patches (spread 7)" in out.output
    assert "only 7 patches could be picked, not 20" in out.output
    assert "--queue picked" in out.output
    assert main(["pick", str(ws.root), "--patches", "1"]) == 2
    assert "holds no patch to pick" in capsys.readouterr().err
    ws.add_labels([(p["patch_id"], "none") for p in ws.picked_patches()], reviewer="ana")
    assert main(["review", str(ws.root), "--queue", "picked", "--reviewer", "ana"]) == 0
    assert "no unanswered picks; choose some with: trainkit pick" in capsys.readouterr().out


# ----- the network's features ---------------------------------------------------------------------


@pytest.mark.parametrize("backbone", ["efficientnet_lite0", "resnet18", "tiny_cnn"])
def test_penultimate_features_are_what_the_head_sees(backbone):
    import torch

    from trainkit.learning.config import TrainConfig
    from trainkit.learning.features import logits_and_features
    from trainkit.learning.network import build_network

    torch.manual_seed(0)
    net = build_network(TrainConfig(backbone=backbone), 6, load_weights=False).eval()
    images = np.random.default_rng(0).integers(0, 255, (3, 64, 64, 3), dtype=np.uint8)
    logits, feats = logits_and_features(net, backbone, images, batch_size=2)
    x = net[0](torch.from_numpy(images))
    m = net[1]
    with torch.no_grad():
        if backbone == "efficientnet_lite0":  # timm's own pre-logits features
            ref = m.forward_head(m.forward_features(x), pre_logits=True)
        elif backbone == "resnet18":  # torchvision: every child but the final fc
            ref = torch.nn.Sequential(*list(m.children())[:-1])(x).flatten(1)
        else:
            ref = m.pool(m.features(x)).flatten(1)
        np.testing.assert_allclose(feats, ref.numpy(), rtol=1e-5, atol=1e-5)
        np.testing.assert_allclose(
            logits, net(torch.from_numpy(images)).numpy(), rtol=1e-5, atol=1e-5
        )
    assert feats.shape == (
        3,
        {"efficientnet_lite0": 1280, "resnet18": 512, "tiny_cnn": 128}[backbone],
    )


def tiny_experiment(folder):
    """An experiment folder holding a checkpoint of an untrained tiny_cnn (16-px input)."""
    import torch

    from trainkit.core.experiment import Experiment
    from trainkit.learning.config import TrainConfig
    from trainkit.learning.network import build_network

    torch.manual_seed(0)
    cfg = TrainConfig(backbone="tiny_cnn")
    net = build_network(cfg, 6, load_weights=False)
    exp = Experiment(folder)
    exp.checkpoint_path.parent.mkdir(parents=True, exist_ok=True)
    torch.save(
        {
            "format": "trainkit-checkpoint-1",
            "model": net.state_dict(),
            "config": cfg.model_dump(mode="json"),
            "class_set": load_class_set("orientation").to_dict(),
            "input_px": 16,
        },
        exp.checkpoint_path,
    )
    return folder


def test_pick_command_with_a_model_guides_only_train_groups(tmp_path, capsys):
    from trainkit.learning.features import CheckpointScorer, model_scorer

    exp = tiny_experiment(tmp_path / "exp")
    scorer = model_scorer(exp)
    assert isinstance(scorer, CheckpointScorer) and scorer.input_px == 16
    probs, feats = scorer(np.zeros((2, 16, 16, 3), np.uint8))
    np.testing.assert_allclose(probs.sum(axis=1), 1.0, rtol=1e-6)  # a float32 softmax
    assert feats.shape == (2, 128)
    ws = archive_ws(tmp_path / "ws", groups={"A": 2, "B": 2})
    a = next(r.id for r in ws.patches() if r.group == "A")
    b = next(r.id for r in ws.patches() if r.group == "B")
    ws.set_split({a: "train", b: "test"}, {})
    args = ["pick", str(ws.root), "--patches", "8", "--seed", "4", "--model", str(exp)]
    assert main([*args, "--pool", "2", "--json"]) == 0
    res = json.loads(capsys.readouterr().out)
    assert res["groups"]["A"]["guided"] and not res["groups"]["B"]["guided"]
    assert res["features"] == "penultimate" and res["pool_size"] == 8
    assert res["by_reason"]["spread"] == 4 and res["by_reason"]["diverse"] == 3
    group = {r.id: r.group for r in ws.patches()}
    for p in ws.picked_patches():
        assert (p["reason"] == "spread") == (group[p["patch_id"]] == "B")


def test_the_scale_benchmark_runs_small(tmp_path, capsys):
    from conftest import benchmark_module

    with benchmark_module("pick_scale") as bench:
        args = ["--photos", "12", "--per-photo", "30", "--groups", "4", "--patches", "40"]
        assert bench.main([*args, "--scratch", str(tmp_path)]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["patches"] == 360 and out["pick1_picked"] == out["pick2_picked"] == 40
    assert out["pick1_per_group"] == [10, 10]


def test_a_pick_whose_photo_is_missing_says_which_and_records_nothing(tmp_path, capsys):
    ws = make_ws(tmp_path / "ws", 2, 3, size=SIZE)
    with ws.connect() as con:  # patches by reference: cut from /x/p*.jpg, which do not exist
        con.execute("UPDATE patches SET crop = ''")
    assert main(["pick", str(ws.root), "--patches", "4", "--seed", "1"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("trainkit: photo p") and "is no longer at /x/p" in err
    assert ws.picks() == [] and ws.picked_patches() == []


def test_a_model_pick_whose_quota_falls_outside_train_groups_is_spread(tmp_path):
    ws = archive_ws(tmp_path / "ws", groups={"A": 1, "B": 1})
    a = next(r.id for r in ws.patches() if r.group == "A")
    ws.set_split({a: "train"}, {})
    reasons = set()
    for seed in range(8):  # one patch: the seed gives it to A (guided) or B (spread)
        res = pick_patches(ws, 1, seed=seed, scorer=FakeScorer(), cache=False)
        reasons |= {r for r, k in res["by_reason"].items() if k}
    assert reasons == {"spread", "uncertain"}
