"""How long a spread pick takes on an archive-sized workspace, and how much memory it needs.

A workspace of ``--photos`` photos of ``--per-photo`` patches each (default 1,953 x 768 =
1.5 million patches, a 12-MP photo tiled at 128 px) is made by inserting rows directly
(no image exists: the pick is timed without caching crops, which costs one photo decode
per photo with a pick and is measured by ``benchmarks/archive.py``'s decode bound). The
photos are spread over ``--groups`` structures and three scales; about one patch in ten
carries a quality flag, one in fifty is left out of review, and 5,000 (at most a tenth)
are labelled and split. Then ``pick_patches(ws, N, cache=False)`` is timed twice (the
second pick adds to the first), with the peak resident memory of the process (VmHWM); the
workspace is built in a child process so that peak is the pick's own.

Usage: python benchmarks/pick_scale.py [--photos 1953] [--per-photo 768] [--groups 20]
       [--patches 2000] [--scratch DIR]
"""

from __future__ import annotations

import argparse
import json
import multiprocessing
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from trainkit.core.taxonomy import load_class_set  # noqa: E402
from trainkit.labels.picking import pick_patches  # noqa: E402
from trainkit.store.workspace import Workspace  # noqa: E402


def build(root: Path, photos: int, per_photo: int, groups: int, seed: int = 0) -> None:
    """A workspace of ``photos`` x ``per_photo`` patch rows, inserted directly."""
    ws = Workspace.create(root, class_set=load_class_set("orientation"), tile_px=128)
    rng = np.random.default_rng(seed)
    side = int(np.ceil(np.sqrt(per_photo)))
    now = time.time()
    with ws.connect() as con:
        con.executemany(
            "INSERT INTO photos(id, name, source_path, size_bytes, width, height, gsd_mm,"
            " gsd_source, group_id, sha256, added_at, grid_px, first_patch, last_patch)"
            " VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
            [
                (i + 1, f"p{i:05d}.jpg", f"/archive/p{i:05d}.jpg", 4_000_000, 4000, 3000,
                 (0.2, 0.35, 0.8)[i % 3], "option", f"structure-{i % groups:03d}",
                 f"{i:064x}", now, 128, i * per_photo + 1, (i + 1) * per_photo)
                for i in range(photos)
            ],
        )  # fmt: skip
        flags = np.where(rng.random(photos * per_photo) < 0.1, "blurred", "")
        skip = rng.random(photos * per_photo) < 0.02
        rows = (
            (k + 1, i + 1, c // side, c % side, 128 * (c % side), 128 * (c // side),
             128 * (c % side) + 128, 128 * (c // side) + 128, "", None, 50.0, 0.0,
             str(flags[k]), int(skip[k]))
            for i in range(photos) for c in range(per_photo) for k in [i * per_photo + c]
        )  # fmt: skip
        con.executemany(
            "INSERT INTO patches(id, photo_id, row, col, x0, y0, x1, y1, crop, patch_mm, focus,"
            " clipped, flags, review_skip) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
            rows,
        )
        n = photos * per_photo
        labelled = rng.choice(n, min(5000, n // 10), replace=False) + 1
        con.executemany(
            "INSERT INTO label_events(patch_id, label, reviewer, origin, created_at)"
            " VALUES (?, 'none', 'bench', 'file', ?)",
            [(int(p), now) for p in labelled],
        )
        con.execute(
            "INSERT INTO split_assignments(patch_id, subset) SELECT e.patch_id, CASE"
            " WHEN ph.id % 5 = 0 THEN 'test' WHEN ph.id % 7 = 0 THEN 'val' ELSE 'train' END"
            " FROM label_events e JOIN patches p ON p.id = e.patch_id"
            " JOIN photos ph ON ph.id = p.photo_id"
        )


def peak_mb() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--photos", type=int, default=1953)
    ap.add_argument("--per-photo", type=int, default=768)
    ap.add_argument("--groups", type=int, default=20)
    ap.add_argument("--patches", type=int, default=2000)
    ap.add_argument("--scratch", type=Path, default=None)
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(dir=args.scratch) as tmp:
        t0 = time.perf_counter()
        root = Path(tmp) / "ws"
        # built in a child process, so this process's peak memory is the pick's own
        child = multiprocessing.get_context("fork").Process(
            target=build, args=(root, args.photos, args.per_photo, args.groups)
        )
        child.start()
        child.join()
        if child.exitcode:
            raise SystemExit(f"building the workspace failed (exit {child.exitcode})")
        built = time.perf_counter() - t0
        ws = Workspace.open(root)
        before = peak_mb()
        out = {"patches": args.photos * args.per_photo, "photos": args.photos, "build_s": built}
        for run in (1, 2):
            t0 = time.perf_counter()
            res = pick_patches(ws, args.patches, seed=run, cache=False)
            out[f"pick{run}_s"] = round(time.perf_counter() - t0, 2)
            out[f"pick{run}_picked"] = res["picked"]
            per = [g["picked"] for g in res["groups"].values()]
            out[f"pick{run}_per_group"] = [min(per), max(per)]
        out["peak_mb_before_pick"] = round(before, 1)
        out["peak_mb"] = round(peak_mb(), 1)
        out["db_mb"] = round(ws.db_path.stat().st_size / 2**20, 1)
    print(json.dumps(out, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
