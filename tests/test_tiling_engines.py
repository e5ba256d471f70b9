"""Tiling engines: the same rows from 1 or 2 processes and from Dask, no crops, resume after kill -9."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from trainkit.cli import main
from trainkit.core.taxonomy import load_class_set
from trainkit.intake import tiling
from trainkit.intake.tiling import tile_into_workspace
from trainkit.store.workspace import Workspace

TILE = 32


def photo_folder(root: Path, n: int = 6) -> Path:
    """n small photos: JPEGs of different sizes (the first the largest, so that later ones
    finish first on a pool), one turned by EXIF orientation 6, one PNG, one truncated."""
    d = root / "photos"
    (d / "sub").mkdir(parents=True)
    rng = np.random.default_rng(5)
    for i in range(n):
        h, w = (150, 230) if i == 0 else (60 + 7 * i, 90 + 5 * i)
        img = rng.integers(30, 220, (h, w, 3), dtype=np.uint8)
        img[: h // 3, : w // 3] = 128  # flat corner: flags
        folder = d / "sub" if i % 2 else d
        if i == 1:
            exif = Image.Exif()
            exif[0x0112] = 6  # rotated 90 degrees clockwise for display
            Image.fromarray(img).save(folder / f"p{i}.jpg", quality=90, exif=exif)
        elif i == 2:
            Image.fromarray(img).save(folder / f"p{i}.png")
        else:
            Image.fromarray(img).save(folder / f"p{i}.jpg", quality=90)
    good = (d / "p0.jpg").read_bytes()
    (d / "zz_truncated.jpg").write_bytes(good[: len(good) // 2])
    return d


def listed(folder: Path) -> tuple[list[Path], dict[Path, Path]]:
    from trainkit.core.decode import find_images

    found = find_images([folder])
    return [p for p, _ in found], {p: r for p, r in found if r is not None}


def new_ws(path: Path) -> Workspace:
    return Workspace.create(path, class_set=load_class_set("orientation"), tile_px=TILE)


def table_rows(ws: Workspace) -> dict[str, list[tuple]]:
    """Every row of photos and patches, all columns (ids included) but the time of intake."""
    con = sqlite3.connect(ws.db_path)
    try:
        out = {}
        for table in ("photos", "patches"):
            cur = con.execute(f"SELECT * FROM {table} ORDER BY id")
            keep = [i for i, d in enumerate(cur.description) if d[0] != "added_at"]
            out[table] = [tuple(r[i] for i in keep) for r in cur.fetchall()]
        return out
    finally:
        con.close()


def tiled(ws_dir: Path, folder: Path, **kw) -> tuple[dict, Workspace, list]:
    photos, roots = listed(folder)
    ws = new_ws(ws_dir)
    calls: list[tuple[int, int]] = []
    res = tile_into_workspace(
        photos, ws, roots=roots, progress=lambda i, n, name: calls.append((i, n)), **kw
    )
    return res, ws, calls


def files_in(root: Path) -> list[str]:
    return sorted(p.relative_to(root).as_posix() for p in root.rglob("*") if p.is_file())


def test_two_processes_store_the_same_rows_as_one_and_no_crops(tmp_path):
    folder = photo_folder(tmp_path)
    one, ws1, calls1 = tiled(tmp_path / "ws1", folder, workers=1)
    two, ws2, calls2 = tiled(tmp_path / "ws2", folder, workers=2)  # default: processes
    assert two["workers"] == 2
    assert one["photos_added"] == two["photos_added"] == 6
    assert one["photos_skipped"] == two["photos_skipped"] == 1
    assert one["problems"] == two["problems"]
    rows = table_rows(ws1)
    assert rows == table_rows(ws2)
    assert len(rows["patches"]) == one["patches_added"] > 6
    # progress: once per photo, in order, on both engines
    assert calls1 == calls2 == [(i, 7) for i in range(1, 8)]
    # patches by reference: no crop stored, the grid's box side recorded with the photo
    assert {p.crop for p in ws2.patches()} == {""}
    assert {r["grid_px"] for r in ws2.photos()} == {TILE}
    assert all(not f.startswith("patches/") for f in files_in(ws2.root))
    turned = next(r for r in ws2.photos() if r["name"] == "sub/p1.jpg")
    assert (turned["width"], turned["height"]) == (60 + 7, 90 + 5)  # EXIF orientation applied


def test_threads_store_the_same_rows_too(tmp_path):
    folder = photo_folder(tmp_path, n=3)
    _, ws1, _ = tiled(tmp_path / "ws1", folder, workers=1)
    _, ws2, _ = tiled(tmp_path / "ws2", folder, workers=2, parallel="threads")
    assert table_rows(ws1) == table_rows(ws2)


def test_tiling_by_size_records_the_box_side_and_patch_mm(tmp_path):
    folder = photo_folder(tmp_path, n=2)
    res, ws, _ = tiled(tmp_path / "ws", folder, workers=1, tile_mm=10.0, scale=_gsd(0.25))
    assert res["photos_added"] == 2
    assert {r["grid_px"] for r in ws.photos()} == {40}  # 10 mm / 0.25 mm per px
    assert {p.patch_mm for p in ws.patches()} == {10.0}


def _gsd(mm: float):
    from trainkit.intake.scale import ScaleOptions

    return ScaleOptions(gsd_mm=mm)


def test_dask_engine_on_a_local_cluster_stores_the_same_rows(tmp_path):
    import distributed  # dev extra

    folder = photo_folder(tmp_path, n=4)
    _, ws1, calls1 = tiled(tmp_path / "ws1", folder, workers=1)
    with distributed.LocalCluster(
        n_workers=1, threads_per_worker=2, processes=False, dashboard_address=None
    ) as cluster:
        res, ws2, calls2 = tiled(
            tmp_path / "ws2", folder, engine="dask", scheduler=cluster.scheduler_address
        )
    assert res["photos_added"] == 4 and res["engine"] == "dask"
    assert table_rows(ws1) == table_rows(ws2)
    assert calls1 == calls2 == [(i, 5) for i in range(1, 6)]
    assert files_in(ws2.root) == files_in(ws1.root)


def cli_lines(args, capsys) -> tuple[int, list[str]]:
    code = main(["-q", "tile", *map(str, args)])
    return code, capsys.readouterr().err.splitlines()


def test_dask_engine_without_a_scheduler_is_one_line_and_writes_nothing(tmp_path, capsys):
    folder = photo_folder(tmp_path, n=1)
    code, lines = cli_lines([folder, "--workspace", tmp_path / "ws", "--engine", "dask"], capsys)
    assert code == 2
    assert lines == [
        "trainkit: the dask engine needs --scheduler ADDRESS (e.g. tcp://127.0.0.1:8786)"
    ]
    assert not (tmp_path / "ws").exists()


def test_unreachable_scheduler_is_one_line(tmp_path, capsys, monkeypatch):
    pytest.importorskip("distributed")
    monkeypatch.setattr(tiling, "DASK_CONNECT_TIMEOUT_S", 1)
    folder = photo_folder(tmp_path, n=1)
    args = [folder, "--workspace", tmp_path / "ws", "--engine", "dask"]
    code, lines = cli_lines([*args, "--scheduler", "tcp://127.0.0.1:9"], capsys)
    assert code == 2 and len(lines) == 1, lines
    assert lines[0].startswith("trainkit: cannot reach the Dask scheduler at tcp://127.0.0.1:9 (")
    assert Workspace.open(tmp_path / "ws").photos() == []


def test_dask_engine_without_dask_installed_is_one_line(tmp_path, capsys, monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # import fails as if not installed
    folder = photo_folder(tmp_path, n=1)
    args = [folder, "--workspace", tmp_path / "ws", "--engine", "dask"]
    code, lines = cli_lines([*args, "--scheduler", "tcp://127.0.0.1:9"], capsys)
    assert code == 2
    assert lines == [
        "trainkit: the dask engine needs dask.distributed: pip install 'trainkit-concrete[dask]'"
    ]


def test_crop_format_is_accepted_ignored_and_said_so(tmp_path, capsys):
    folder = photo_folder(tmp_path, n=2)
    (folder / "zz_truncated.jpg").unlink()
    args = [folder, "--workspace", tmp_path / "ws", "--tile-px", "32", "--crop-format", "png"]
    code, lines = cli_lines(args, capsys)
    assert code == 0
    assert lines == [
        "trainkit: --crop-format is ignored: tiling no longer writes crops (patches are cut "
        "from the photos when needed)"
    ]
    ws = Workspace.open(tmp_path / "ws")
    assert len(ws.photos()) == 2
    assert all(not f.startswith("patches/") for f in files_in(ws.root))
    with pytest.warns(DeprecationWarning, match="crop_format is ignored"):
        tile_into_workspace([folder / "p0.jpg"], ws, workers=1, crop_format="tiff")


def test_photos_found_elsewhere_are_re_pointed_not_added_again(tmp_path):
    import shutil

    folder = photo_folder(tmp_path, n=3)
    _, ws, _ = tiled(tmp_path / "ws", folder, workers=1)
    before = table_rows(ws)
    moved = tmp_path / "new-disk" / "photos"
    shutil.copytree(folder, moved)
    shutil.rmtree(folder)
    photos, roots = listed(moved)
    res = tile_into_workspace(photos, ws, roots=roots, workers=2)
    assert (res["photos_added"], res["photos_moved"], res["photos_already_present"]) == (0, 3, 0)
    after = table_rows(ws)
    assert after["patches"] == before["patches"]
    assert {r["source_path"] for r in ws.photos()} == {
        str(p.resolve()) for p in photos if "truncated" not in p.name
    }


def test_photos_in_flight_are_bounded():
    """The workers are handed at most `ahead` photos beyond the one being stored."""

    class Done:
        def __init__(self, value):
            self.value = value

        def result(self):
            return self.value

    outstanding, worst = [0], [0]

    def submit(job):
        outstanding[0] += 1
        worst[0] = max(worst[0], outstanding[0])
        return Done(job)

    got = []
    for res in tiling._in_order(submit, list(range(50)), ahead=4):
        outstanding[0] -= 1
        got.append(res)
    assert got == list(range(50)) and worst[0] == 4 + 1


# ----- interrupted runs -------------------------------------------------------------

#: `trainkit tile` in a child process whose storing of each photo pauses half-way through
#: the photo's patch rows (inside its transaction), so that a kill lands mid-photo.
_SLOW_TILE = """
import sys, time
from trainkit.store import workspace

store = workspace.Workspace.add_photo_with_patches

def slow(self, **kw):
    rows = list(kw["patches"])
    def paused():
        for i, row in enumerate(rows):
            if i == len(rows) // 2:
                time.sleep(0.6)
            yield row
    kw["patches"] = paused()
    return store(self, **kw)

workspace.Workspace.add_photo_with_patches = slow
from trainkit.cli import main
sys.exit(main(sys.argv[1:]))
"""


def _descendants(pid: int) -> set[int]:
    parents: dict[int, int] = {}
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        parents[int(stat.parent.name)] = int(fields[1])
    found, frontier = set(), {pid}
    while frontier:
        frontier = {p for p, pp in parents.items() if pp in frontier} - found
        found |= frontier
    return found


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"


@pytest.mark.skipif(not Path("/proc").is_dir(), reason="reads processes from /proc")
def test_tile_killed_mid_run_resumes_without_doubles(tmp_path):
    """kill -9 of `trainkit tile` (2 worker processes) while it stores a photo; the re-run
    adds the rest and the rows equal an uninterrupted run's; no worker outlives the kill."""
    folder = photo_folder(tmp_path, n=8)
    (folder / "zz_truncated.jpg").unlink()
    ws_dir = tmp_path / "ws"
    args = ["-q", "tile", str(folder), "--workspace", str(ws_dir), "--tile-px", str(TILE)]
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    child = subprocess.Popen(
        [sys.executable, "-c", _SLOW_TILE, *args, "--workers", "2"],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    try:
        deadline = time.monotonic() + 120
        stored = 0
        while stored < 2 and child.poll() is None and time.monotonic() < deadline:
            time.sleep(0.05)
            if (ws_dir / "workspace.sqlite").exists():
                con = sqlite3.connect(ws_dir / "workspace.sqlite", timeout=30)
                try:
                    stored = con.execute("SELECT COUNT(*) FROM photos").fetchone()[0]
                except sqlite3.OperationalError:  # tables not made yet
                    stored = 0
                finally:
                    con.close()
        assert child.poll() is None, "the run ended before it could be interrupted"
        time.sleep(0.3)  # into the next photo's transaction (paused half-way)
        workers = _descendants(child.pid)
        assert len(workers) >= 2  # the forkserver and the pool's processes
        os.kill(child.pid, signal.SIGKILL)
        child.wait(timeout=30)
    finally:
        if child.poll() is None:
            child.kill()
            child.wait()
    deadline = time.monotonic() + 20
    while any(_alive(p) for p in workers) and time.monotonic() < deadline:
        time.sleep(0.1)
    assert not any(_alive(p) for p in workers), "pool processes outlived the killed run"

    ws = Workspace.open(ws_dir)
    interrupted = len(ws.photos())
    print(f"interrupted after {interrupted} photos; {len(workers)} pool processes")
    assert 2 <= interrupted < 8
    assert main([*args, "--workers", "2"]) == 0  # the re-run
    _, ref, _ = tiled(tmp_path / "ref", folder, workers=1)
    assert table_rows(ws) == table_rows(ref)
    names = [r["name"] for r in ws.photos()]
    assert len(names) == len(set(names)) == 8
