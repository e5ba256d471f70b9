"""tiny_dataset/ is exactly what its documented command makes, and its labels are consistent."""

from __future__ import annotations

import csv
import hashlib
import json
from pathlib import Path

from trainkit.cli import main
from trainkit.core.grid import grid_boxes
from trainkit.demo import TINY_DATASET

TINY = Path(__file__).resolve().parents[1] / "tiny_dataset"


def digest_tree(root: Path) -> dict[str, str]:
    return {
        str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(root.rglob("*"))
        if p.is_file() and p.name != "README.md"
    }


def test_documented_command_reproduces_the_committed_files(tmp_path):
    readme = (TINY / "README.md").read_text()
    cmd = (
        f"trainkit synth tiny_dataset --photos {TINY_DATASET['n_photos']} --seed {TINY_DATASET['seed']} "
        f"--size {TINY_DATASET['width']}x{TINY_DATASET['height']} --tile-px {TINY_DATASET['tile_px']}"
    )
    assert cmd in readme
    args = cmd.split()[1:]
    args[1] = str(tmp_path / "again")
    assert main(["-q", *args]) == 0
    assert digest_tree(tmp_path / "again") == digest_tree(TINY)


def test_labels_cover_every_tile_of_every_photo():
    rows = list(csv.DictReader((TINY / "labels.csv").open()))
    photos = sorted(p.name for p in (TINY / "photos").glob("*.jpg"))
    assert len(photos) == TINY_DATASET["n_photos"]
    expected = {(ph, b) for ph in photos for b in grid_boxes(512, 768, 128)}
    got = {(r["photo"], tuple(int(r[k]) for k in ("x0", "y0", "x1", "y1"))) for r in rows}
    assert got == expected and len(rows) == len(expected)
    manifest = json.loads((TINY / "manifest.json").read_text())
    counts = {}
    for r in rows:
        key = r["label"] or "ambiguous"
        counts[key] = counts.get(key, 0) + 1
        assert (r["label"] == "") == (r["status"] == "ambiguous")
    assert counts == {k: v for k, v in manifest["counts"].items() if v}
    assert sum(p.stat().st_size for p in TINY.rglob("*")) < 8_000_000


def test_photos_carry_the_generators_invented_names():
    from trainkit.synth import ASSET_OWNER, STRUCTURES

    manifest = json.loads((TINY / "manifest.json").read_text())
    assert manifest["asset_owner"] == ASSET_OWNER
    assert set(manifest["structures"]) <= set(STRUCTURES)
    rows = list(csv.DictReader((TINY / "scale.csv").open()))
    assert {r["structure"] for r in rows} == set(manifest["structures"])
    for r in rows:
        assert r["photo"].startswith(r["structure"] + "-")
        assert (TINY / "photos" / r["photo"]).is_file()
    assert sum(1 for _ in rows) == sum(manifest["structures"].values())
