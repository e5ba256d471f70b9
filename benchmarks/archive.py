"""Archive benchmark: what tiling a firm's photo archive costs, against the JPEG-decode bound.

Everything is invented with the kit's own generator (trainkit.synth; no real photos):

1. An archive of synthetic JPEGs (12 megapixels by default, 4000 x 3000) in a scratch
   folder outside the repository: a few photos made by ``generate_photo`` and the rest
   derived from them cheaply (a flip, a circular shift and a brightness step, each
   re-encoded at JPEG quality 90), every file distinct by SHA-256 (checked).
2. For each archive size N (the first N files; 100, 500 and 2,000 by default), side by
   side in the same run, each measurement in a process of its own:
   (a) the bound: reading and decoding the same N files one after another with plain
       OpenCV (``cv2.imdecode``, one thread);
   (b) ``tile_into_workspace`` (the library call behind ``trainkit tile``, with its
       default engine, recorded) into a new workspace with 1 and with 2 workers: seconds
       per photo, the bound's share of it per process, the speed-up of 2 over 1;
   (c) the workspace's bytes and files, per photo and as a share of the archive's bytes;
   (d) peak memory of the tiling process and every process below it (pool workers,
       their server): each one's high-water mark (VmHWM, read from /proc) added up, and
       the highest sum of their VmRSS at one sample (every 0.1 s);
   (e) ``status``: the wall time of ``python -m trainkit status WS`` as a user runs it
       (interpreter start included) and of ``Workspace.open(WS).summary()``;
   (f) opening review: the wall time of a fresh process that builds the unlabelled queue
       (``prepare_session``) and has the first patch's pixels ready, what a reviewer
       waits for before the first screen.
3. On the largest size: 2,000 patches picked by ``trainkit pick`` (which cuts and caches
   their crops), review opened on the picked queue (what an archive's reviewer uses) and
   the picks labelled (``import_csv``): crop-store bytes per labelled patch and the
   seconds of each step.
4. A least-squares line over the sizes for each total, with residuals (the issue wants
   cost linear in photos), and each total on its line at 40,000 photos: an
   extrapolation, not a measurement.

Every figure with a target of issue 22 is printed beside it with met / not met
(:data:`TARGETS`). The figures are ratios measured side by side on one machine;
absolute seconds depend on the machine and its load (recorded from /proc/loadavg).

Usage: python benchmarks/archive.py OUT [--photos N [N ...]] [--quick] [--megapixels MP]
       [--made K] [--tile-px PX] [--workers 1 2] [--labelled N] [--json PATH]
       [--scratch DIR] [--quiet]

OUT receives ``archive.json`` (or --json PATH); the archive and the workspaces live in a
temporary folder (or one made inside --scratch DIR) that is removed at the end.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import math
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]

#: What every results file of this benchmark says first.
CAUTION = (
    "The screener is a triage aid, not an inspection; these figures hold only for photos "
    "like the synthetic ones made here; defer to local codes and licensed engineers."
)
#: Archive size the totals are extrapolated to (issue 22: 20 jobs x 2,000 frames).
EXTRAPOLATE_TO = 40_000
#: Seed of the first made photo; made photo k uses SEED + k.
SEED = 220_022
#: Sizes, photo size and labelled patches of a full run and of --quick.
FULL_PHOTOS = (100, 500, 2000)
FULL_LABELLED = 2000
QUICK_PHOTOS = (6, 12)
QUICK_MEGAPIXELS = 2.0
QUICK_LABELLED = 40
#: Seconds between two samples of the tiling process tree's memory.
SAMPLE_INTERVAL = 0.1

#: Issue 22's targets: figure -> (comparison, bound, the target in words). Two are this
#: benchmark's own reading of words the issue leaves open, and say so.
TARGETS: dict[str, tuple[str, float, str]] = {
    "workspace_share_of_archive": (
        "<=",
        0.02,
        "workspace before labelling <= 2 % of the archive's bytes",
    ),
    "workspace_files_growth": (
        "<=",
        0,
        "a bounded number of files: no more workspace files at the largest size than at "
        "the smallest",
    ),
    "crop_store_bytes_per_labelled_patch": ("<=", 60_000, "<= 60 KB per labelled patch"),
    "decode_bound_share": (
        ">=",
        0.7,
        "tiling >= 0.7 of the JPEG-decode bound per process",
    ),
    "speedup_2_vs_1": (">=", 1.7, ">= 1.7x faster with 2 processes than with 1"),
    "peak_mb": ("<", 1000.0, "memory < 1 GB (taken as 1,000 MiB) at the largest size"),
    "peak_growth": (
        "<=",
        1.25,
        "memory flat in archive size: peak at the largest size <= 1.25x the peak at the "
        "smallest (this benchmark's reading of 'flat')",
    ),
    "status_cli_seconds": ("<", 2.0, "`status` on the largest workspace in < 2 s"),
    "linear_in_photos": (
        "<=",
        0.10,
        "cost linear in photos: each total (decode, tiling, workspace bytes) within 10 % "
        "of its least-squares line over the sizes (this benchmark's reading)",
    ),
    "per_photo_growth": (
        "<=",
        1.10,
        "cost linear in photos, per photo: tiling seconds and workspace bytes per photo at "
        "the largest size at most 1.1x those at the smallest (nothing grows with the archive)",
    ),
}


def say(quiet: bool, *parts) -> None:
    if not quiet:
        print(*parts, flush=True)


# --- the archive -------------------------------------------------------------------------


def photo_size(megapixels: float) -> tuple[int, int]:
    """(height, width) of a 4:3 photo of about ``megapixels`` (12 -> 3000 x 4000)."""
    if not (megapixels > 0 and math.isfinite(megapixels)):
        raise ValueError(f"--megapixels: expected a positive number, got {megapixels!r}")
    width = int(round(math.sqrt(megapixels * 1e6 * 4 / 3) / 4)) * 4
    height = width * 3 // 4
    if height < 128:
        raise ValueError(f"--megapixels {megapixels} gives {height} rows; expected >= 128")
    return height, width


def derive(base: np.ndarray, i: int) -> np.ndarray:
    """The i-th cheap variant of a made photo: a flip, a circular shift, a brightness step.

    The shift (7 px per step down, 13 px across) differs for every i below
    ``height / 7``, so the variants of one photo differ in pixels, not only in bytes.
    """
    import cv2

    flipped = (base, base[:, ::-1], base[::-1, :], base[::-1, ::-1])[i % 4]
    h, w = base.shape[:2]
    shifted = np.roll(flipped, ((7 * i) % h, (13 * i) % w), axis=(0, 1))
    step = float((i % 5) - 2) * 4.0  # -8 .. +8 grey levels
    return cv2.add(shifted, (step, step, step, 0)) if step else shifted


def make_archive(
    folder: Path,
    n_photos: int,
    *,
    megapixels: float,
    made: int,
    quiet: bool = True,
) -> dict:
    """Write ``n_photos`` distinct JPEGs to ``folder``: ``made`` generated, the rest derived.

    Returns:
        ``paths`` (in order), ``bytes`` (their total), ``distinct_sha256`` (counted),
        ``made``, ``height``, ``width`` and the seconds spent.
    """
    import cv2

    from trainkit.synth import SynthOptions, generate_photo

    height, width = photo_size(megapixels)
    made = max(1, min(made, n_photos))
    folder.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    bases = []
    for k in range(made):
        say(quiet, f"  generating photo {k + 1}/{made} ({width} x {height}) ...")
        photo = generate_photo(SEED + k, SynthOptions(height=height, width=width))
        bases.append(cv2.cvtColor(photo.image, cv2.COLOR_RGB2BGR))
    paths, digests, total = [], set(), 0
    for i in range(n_photos):
        base = bases[i % made]
        variant = base if i < made else derive(base, i // made)
        ok, buf = cv2.imencode(".jpg", variant, [cv2.IMWRITE_JPEG_QUALITY, 90])
        if not ok:
            raise RuntimeError(f"OpenCV could not encode archive photo {i}")
        data = buf.tobytes()
        path = folder / f"job{i // 500:02d}" / f"frame_{i:05d}.jpg"
        path.parent.mkdir(exist_ok=True)
        path.write_bytes(data)
        paths.append(path)
        digests.add(hashlib.sha256(data).hexdigest())
        total += len(data)
    if len(digests) != n_photos:
        raise RuntimeError(f"archive has {len(digests)} distinct files of {n_photos}")
    return {
        "paths": paths,
        "bytes": total,
        "distinct_sha256": len(digests),
        "made": made,
        "height": height,
        "width": width,
        "seconds": round(time.perf_counter() - t0, 2),
    }


def folder_usage(root: Path) -> tuple[int, int]:
    """(bytes, files) of the regular files below ``root`` (directories not counted)."""
    n_bytes = n_files = 0
    for p in root.rglob("*"):
        if p.is_file():
            n_bytes += p.stat().st_size
            n_files += 1
    return n_bytes, n_files


# --- memory of a process tree --------------------------------------------------------


def process_tree(pid: int) -> list[int]:
    """``pid`` and every process below it, from /proc/PID/task/TID/children."""
    out, i = [pid], 0
    while i < len(out):
        p = out[i]
        i += 1
        try:
            tasks = os.listdir(f"/proc/{p}/task")
        except OSError:
            continue
        for tid in tasks:
            try:
                with open(f"/proc/{p}/task/{tid}/children") as f:
                    out.extend(int(c) for c in f.read().split())
            except OSError:
                pass
    return out


def _memory_kb(pid: int) -> tuple[int, int] | None:
    """(VmRSS, VmHWM) of a process in kB, or None when it is gone (or a zombie)."""
    got = {}
    try:
        with open(f"/proc/{pid}/status") as f:
            for line in f:
                if line.startswith(("VmRSS:", "VmHWM:")):
                    got[line[:5]] = int(line.split()[1])
    except OSError:
        return None
    return (got["VmRSS"], got["VmHWM"]) if len(got) == 2 else None


class TreeMemory:
    """The peak resident memory of a process and its descendants, from /proc.

    A thread reads VmRSS and VmHWM of every process in the tree every ``interval``
    seconds while the ``with`` block runs. Two figures:

    - ``peak_hwm_sum_mb``: each process's own high-water mark (the kernel's VmHWM, last
      seen), added up: a short peak is never missed, and since the processes' peaks need
      not coincide it is an upper bound of what the tree held at once;
    - ``peak_total_mb``: the highest sum of VmRSS over one sample (a peak shorter than
      the interval can be missed).

    Pages shared between processes count once per process in both.
    """

    def __init__(self, pid: int, *, interval: float = SAMPLE_INTERVAL) -> None:
        self.pid = pid
        self.interval = interval
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._peak_total = 0
        self._hwm: dict[int, int] = {}
        self._samples = 0

    def _sample(self) -> bool:
        sizes = {p: _memory_kb(p) for p in process_tree(self.pid)}
        sizes = {p: kb for p, kb in sizes.items() if kb is not None}
        if not sizes:
            return False
        self._samples += 1
        self._peak_total = max(self._peak_total, sum(rss for rss, _ in sizes.values()))
        for p, (_, hwm) in sizes.items():
            self._hwm[p] = max(self._hwm.get(p, 0), hwm)
        return True

    def _run(self) -> None:
        while self._sample() and not self._stop.wait(self.interval):
            pass

    def __enter__(self) -> TreeMemory:
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join()

    def result(self, *, own_hwm_mb: float | None = None) -> dict:
        """The figures (MB = MiB), the largest single process, processes seen, samples.

        Args:
            own_hwm_mb: the watched process's final VmHWM if known (it may have grown
                after the last sample); its part of ``peak_hwm_sum_mb`` is raised to it.
        """
        hwm = dict(self._hwm)
        if own_hwm_mb is not None and self._samples:
            hwm[self.pid] = max(hwm.get(self.pid, 0), round(own_hwm_mb * 1024))
        return {
            "peak_hwm_sum_mb": round(sum(hwm.values()) / 1024, 1),
            "peak_total_mb": round(self._peak_total / 1024, 1),
            "peak_single_mb": round(max(hwm.values(), default=0) / 1024, 1),
            "processes_seen": len(hwm),
            "samples": self._samples,
        }


# --- measurements, each in its own process ----------------------------------------------

_PEAK = """
def _peak_mb():
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    return None
"""

_DECODE_CHILD = (
    _PEAK
    + """
import json, sys, time
import cv2
import numpy as np
cv2.setNumThreads(1)
paths = json.loads(sys.stdin.read())
t0 = time.perf_counter()
for p in paths:
    with open(p, "rb") as f:
        data = f.read()
    bgr = cv2.imdecode(np.frombuffer(data, np.uint8), cv2.IMREAD_COLOR)
    if bgr is None:
        raise SystemExit(f"OpenCV could not decode {p}")
print(json.dumps({"seconds": time.perf_counter() - t0, "peak_mb": _peak_mb()}))
"""
)

_TILE_CHILD = (
    _PEAK
    + """
import inspect, json, sys, time
from pathlib import Path
from trainkit.core.taxonomy import load_class_set
from trainkit.intake.tiling import tile_into_workspace
from trainkit.store.workspace import Workspace
a = json.loads(sys.stdin.read())
paths = [Path(p) for p in a["paths"]]
root = Path(a["root"])
params = inspect.signature(tile_into_workspace).parameters
engine = {k: params[k].default for k in ("engine", "parallel") if k in params}
ws = Workspace.create(Path(a["ws"]), class_set=load_class_set("presence"), tile_px=a["tile_px"])
t0 = time.perf_counter()
res = tile_into_workspace(paths, ws, workers=a["workers"], roots={p: root for p in paths})
wall = time.perf_counter() - t0
print(json.dumps({"seconds": wall, "peak_mb": _peak_mb(), "engine": engine,
                  "photos_added": res["photos_added"], "patches_added": res["patches_added"],
                  "problems": res["problems"]}))
"""
)

_SUMMARY_CHILD = """
import json, sys, time
t0 = time.perf_counter()
from trainkit.store.workspace import Workspace
t1 = time.perf_counter()
ws = Workspace.open(json.loads(sys.stdin.read()))
t2 = time.perf_counter()
summary = ws.summary()
t3 = time.perf_counter()
print(json.dumps({"import_seconds": t1 - t0, "open_seconds": t2 - t1,
                  "summary_seconds": t3 - t2, "patches": summary.get("patches")}))
"""

_REVIEW_CHILD = """
import json, sys, time
t0 = time.perf_counter()
from trainkit.labels.review import load_patch
from trainkit.labels.review_run import ReviewRequest, prepare_session
from trainkit.store.workspace import Workspace
t1 = time.perf_counter()
a = json.loads(sys.stdin.read())
ws = Workspace.open(a["ws"])
session = prepare_session(ws, ReviewRequest(reviewer="benchmark", queue=a["queue"]))
t2 = time.perf_counter()
pixels = load_patch(ws, session.current())
t3 = time.perf_counter()
print(json.dumps({"import_seconds": t1 - t0, "queue_seconds": t2 - t1,
                  "first_crop_seconds": t3 - t2, "queue_length": len(session.queue),
                  "patch_shape": list(pixels.shape)}))
"""

_LABEL_CHILD = """
import csv, json, sys, time
from trainkit.labels.labels_io import import_csv
from trainkit.store.cropstore import CropStore
from trainkit.store.pixels import PatchPixels
from trainkit.store.workspace import Workspace
a = json.loads(sys.stdin.read())
ws = Workspace.open(a["ws"])
ids = [p["patch_id"] for p in ws.picked_patches()]
names = ws.class_set.names
t0 = time.perf_counter()
with open(a["csv"], "w", newline="") as f:
    w = csv.writer(f)
    w.writerow(["patch_id", "label"])
    for i, pid in enumerate(ids):
        w.writerow([pid, names[i % len(names)]])
added = import_csv(ws, a["csv"], reviewer="benchmark")
t1 = time.perf_counter()
records = ws.patches(labelled=True)
with PatchPixels(ws) as px:
    cut = px.store(records)
t2 = time.perf_counter()
print(json.dumps({"label_seconds": t1 - t0, "store_seconds": t2 - t1, "labelled": len(records),
                  "labels_added": int(added), "cut": int(cut),
                  "crop_store": CropStore(ws.root).stats(),
                  "photos_touched": len({r.photo for r in records})}))
"""


def _env() -> dict:
    return {
        **os.environ,
        "PYTHONPATH": os.pathsep.join([str(REPO), os.environ.get("PYTHONPATH", "")]),
    }


def _child(code: str, arg, *, memory: bool = False) -> dict:
    """Run ``code`` in a fresh interpreter; its last stdout line (JSON) plus its wall time.

    ``arg`` goes to the child's stdin as JSON (2,000 paths do not fit on a command line).
    With ``memory`` the process tree's memory is sampled (:class:`TreeMemory`) and added
    under ``tree``.
    """
    t0 = time.perf_counter()
    proc = subprocess.Popen(
        [sys.executable, "-c", code],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=_env(),
    )
    if memory:
        with TreeMemory(proc.pid) as mem:
            out, err = proc.communicate(json.dumps(arg))
    else:
        out, err = proc.communicate(json.dumps(arg))
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise RuntimeError(f"measurement process failed:\n{err[-2000:]}")
    got = json.loads(out.strip().splitlines()[-1])
    got["wall_seconds"] = wall
    if memory:
        got["tree"] = mem.result(own_hwm_mb=got.get("peak_mb"))
    return got


def time_status(ws: Path) -> float:
    """Wall seconds of ``python -m trainkit status WS`` (interpreter start included)."""
    return run_cli("status", str(ws))[0]


def load() -> list[float]:
    """The 1, 5 and 15-minute load averages of the machine (/proc/loadavg)."""
    return [round(x, 2) for x in os.getloadavg()]


def tile_once(paths: list[Path], archive_root: Path, ws: Path, *, tile_px: int, workers: int):
    """One tiling run in its own process, with its tree's memory sampled."""
    load_before = load()
    t = _child(
        _TILE_CHILD,
        {
            "paths": [str(p) for p in paths],
            "root": str(archive_root),
            "ws": str(ws),
            "tile_px": tile_px,
            "workers": workers,
        },
        memory=True,
    )
    if t["photos_added"] != len(paths):
        raise RuntimeError(
            f"tiling added {t['photos_added']} of {len(paths)} photos: {t['problems']}"
        )
    t["load_before"] = load_before
    return t


def measure_size(
    paths: list[Path],
    archive_root: Path,
    scratch: Path,
    *,
    tile_px: int,
    workers: tuple[int, ...],
    keep_last: bool,
    quiet: bool,
) -> tuple[dict, Path | None]:
    """All figures for one archive size; returns the row and the kept workspace (or None)."""
    n = len(paths)
    archive_bytes = sum(p.stat().st_size for p in paths)
    say(quiet, f"  decode bound ({n} photos) ...")
    dec = _child(_DECODE_CHILD, [str(p) for p in paths])
    decode_s = round(dec["seconds"], 4)  # the figures below follow from the stored totals
    bound = decode_s / n
    row: dict = {
        "photos": n,
        "archive_bytes": archive_bytes,
        "decode_seconds": decode_s,
        "decode_s_per_photo": round(bound, 6),
        "decode_peak_mb": round(dec["peak_mb"], 1),
        "tiling": {},
    }
    ws = None
    for k in workers:
        if ws is not None:
            shutil.rmtree(ws)
        ws = scratch / f"ws_{n}_w{k}"
        say(quiet, f"  tiling with {k} worker{'s' if k > 1 else ''} ...")
        t = tile_once(paths, archive_root, ws, tile_px=tile_px, workers=k)
        ws_bytes, ws_files = folder_usage(ws)
        seconds = round(t["seconds"], 4)
        per_photo = seconds / n
        row["tiling"][str(k)] = {
            "workers": k,
            "engine": t["engine"],
            "seconds": seconds,
            "s_per_photo": round(per_photo, 6),
            "decode_bound_share": round(bound / per_photo, 5),
            "decode_bound_share_per_process": round(bound / (per_photo * k), 5),
            "patches": t["patches_added"],
            "peak_tree_mb": t["tree"]["peak_hwm_sum_mb"],
            "peak_tree_sampled_mb": t["tree"]["peak_total_mb"],
            "peak_tree_single_process_mb": t["tree"]["peak_single_mb"],
            "peak_tree_processes_seen": t["tree"]["processes_seen"],
            "peak_tree_samples": t["tree"]["samples"],
            "peak_tiling_process_mb": round(t["peak_mb"], 1),
            "workspace_bytes": ws_bytes,
            "workspace_files": ws_files,
            "workspace_bytes_per_photo": round(ws_bytes / n),
            "workspace_files_per_photo": round(ws_files / n, 4),
            "workspace_share_of_archive": round(ws_bytes / archive_bytes, 5),
            "load_before": t["load_before"],
        }
    if "1" in row["tiling"] and "2" in row["tiling"]:
        row["speedup_2_vs_1"] = round(
            row["tiling"]["1"]["seconds"] / row["tiling"]["2"]["seconds"], 4
        )
    say(quiet, "  status and review ...")
    lib = _child(_SUMMARY_CHILD, str(ws))
    row["status"] = {
        "cli_seconds": round(time_status(ws), 3),
        "library_seconds": round(lib["open_seconds"] + lib["summary_seconds"], 4),
        "library_open_seconds": round(lib["open_seconds"], 4),
        "library_summary_seconds": round(lib["summary_seconds"], 4),
    }
    rev = _child(_REVIEW_CHILD, {"ws": str(ws), "queue": "unlabelled"})
    row["review"] = {
        "first_patch_seconds": round(rev["wall_seconds"], 3),
        "import_seconds": round(rev["import_seconds"], 3),
        "queue_seconds": round(rev["queue_seconds"], 3),
        "first_crop_seconds": round(rev["first_crop_seconds"], 4),
        "queue_length": rev["queue_length"],
        "patch_shape": rev["patch_shape"],
    }
    if keep_last:
        return row, ws
    shutil.rmtree(ws)
    return row, None


def run_cli(*args: str) -> tuple[float, str]:
    """Wall seconds and stdout of ``python -m trainkit ARGS`` (interpreter start included)."""
    t0 = time.perf_counter()
    run = subprocess.run(
        [sys.executable, "-m", "trainkit", *args],
        capture_output=True,
        text=True,
        env=_env(),
        check=False,
    )
    seconds = time.perf_counter() - t0
    if run.returncode != 0:
        raise RuntimeError(f"trainkit {args[0]} failed: {run.stderr.strip()[-500:]}")
    return seconds, run.stdout


def label_patches(ws: Path, count: int, scratch: Path, *, photos: int) -> dict:
    """Pick ``count`` patches (``trainkit pick``, which cuts and caches their crops), open
    review on them, label them (``import_csv``) and make sure every labelled crop is
    cached (``PatchPixels.store``: nothing left to cut); the costs of each step."""
    before_bytes, before_files = folder_usage(ws)
    pick_s, out = run_cli("pick", str(ws), "--patches", str(count), "--seed", str(SEED), "--json")
    pick = json.loads(out)
    rev = _child(_REVIEW_CHILD, {"ws": str(ws), "queue": "picked"})
    got = _child(_LABEL_CHILD, {"ws": str(ws), "csv": str(scratch / "labels.csv")})
    after_bytes, after_files = folder_usage(ws)
    store = got["crop_store"]
    return {
        "photos": photos,
        "patches": got["labelled"],
        "picked": pick["picked"],
        "photos_touched": got["photos_touched"],
        "pick_seconds": round(pick_s, 3),
        "pick_s_per_patch": round(pick_s / max(1, pick["picked"]), 5),
        "pick_cached": pick["crops"]["cached"],
        "review_first_patch_seconds": round(rev["wall_seconds"], 3),
        "review_queue_length": rev["queue_length"],
        "label_import_seconds": round(got["label_seconds"], 3),
        "cut_after_labelling": got["cut"],
        "store_check_seconds": round(got["store_seconds"], 3),
        "crop_store_bytes": store["file_bytes"],
        "crop_store_crops": store["crops"],
        "crop_store_png_bytes": store["png_bytes"],
        "crop_store_bytes_per_labelled_patch": round(store["file_bytes"] / got["labelled"]),
        "workspace_bytes_growth": after_bytes - before_bytes,
        "workspace_files_growth": after_files - before_files,
    }


# --- figures -------------------------------------------------------------------------------


def line_fit(sizes: list[int], totals: list[float]) -> dict:
    """The least-squares line through (size, total), with residuals and R^2.

    One size gives the line through the origin (cost proportional to photos) and no
    residuals to judge (``r2`` None).
    """
    x = np.asarray(sizes, float)
    y = np.asarray(totals, float)
    if len(x) == 1:
        slope, intercept = float(y[0] / x[0]), 0.0
    else:
        slope, intercept = (float(v) for v in np.polyfit(x, y, 1))
    fitted = slope * x + intercept
    res = y - fitted
    rel = np.divide(res, y, out=np.zeros_like(res), where=y != 0)
    ss_tot = float(np.sum((y - y.mean()) ** 2))
    r2 = None if len(x) < 2 else (1.0 - float(np.sum(res**2)) / ss_tot if ss_tot else 1.0)
    return {
        "slope": slope,
        "intercept": intercept,
        "fitted": fitted.tolist(),
        "residuals": res.tolist(),
        "relative_residuals": rel.tolist(),
        "max_abs_relative_residual": float(np.max(np.abs(rel))),
        "r2": r2,
    }


def at(fit: dict, n: float) -> float:
    """The fitted line at ``n`` photos."""
    return fit["slope"] * n + fit["intercept"]


def verdict(figure: str, value: float | None, where: str = "") -> dict:
    """``value`` against the target of ``figure`` (:data:`TARGETS`); ``met`` None if unmeasured."""
    op, bound, words = TARGETS[figure]
    if value is None:
        met = None
    else:
        met = {"<=": value <= bound, ">=": value >= bound, "<": value < bound}[op]
    return {
        "figure": figure,
        "where": where,
        "value": value,
        "target": words,
        "bound": f"{op} {bound}",
        "met": met,
    }


#: The totals fitted against the number of photos; those judged for linearity first.
_COST_TOTALS = ("decode_seconds", "tiling_seconds_run_{k}", "workspace_bytes")


def totals(rows: list[dict]) -> dict[str, list[float]]:
    """Each total per size, by name (the tiling ones per worker count)."""
    out: dict[str, list[float]] = {"decode_seconds": [r["decode_seconds"] for r in rows]}
    for k in rows[0]["tiling"]:
        t = [r["tiling"][k] for r in rows]
        out[f"tiling_seconds_run_{k}"] = [x["seconds"] for x in t]
        out[f"peak_tree_mb_run_{k}"] = [x["peak_tree_mb"] for x in t]
    first = next(iter(rows[0]["tiling"]))
    out["workspace_bytes"] = [r["tiling"][first]["workspace_bytes"] for r in rows]
    out["workspace_files"] = [r["tiling"][first]["workspace_files"] for r in rows]
    out["status_cli_seconds"] = [r["status"]["cli_seconds"] for r in rows]
    out["status_library_seconds"] = [r["status"]["library_seconds"] for r in rows]
    out["review_first_patch_seconds"] = [r["review"]["first_patch_seconds"] for r in rows]
    out["archive_bytes"] = [r["archive_bytes"] for r in rows]
    return out


def linearity(rows: list[dict]) -> dict:
    """A least-squares line per total over the sizes (see :func:`line_fit`)."""
    sizes = [r["photos"] for r in rows]
    return {name: {"totals": ys, **line_fit(sizes, ys)} for name, ys in totals(rows).items()}


def extrapolation(lin: dict) -> dict:
    """Each total on its line at :data:`EXTRAPOLATE_TO` photos (not a measurement).

    ``status`` and review's first patch are waits, not totals: their line is given, or the
    largest measured figure where the line falls below it (no growth measured). Peak
    memory is not extrapolated (its target is flatness; see the verdicts).
    """
    n = EXTRAPOLATE_TO

    def wait(name: str) -> float:
        return round(max(at(lin[name], n), max(lin[name]["totals"])), 3)

    out: dict = {
        "photos": n,
        "note": "linear extrapolation (least-squares line over the measured sizes), not measured",
        "archive_bytes": round(at(lin["archive_bytes"], n)),
        "decode_bound_hours": round(at(lin["decode_seconds"], n) / 3600, 3),
        "workspace_bytes": round(at(lin["workspace_bytes"], n)),
        "workspace_files": round(at(lin["workspace_files"], n), 1),
        "status_cli_seconds": wait("status_cli_seconds"),
        "review_first_patch_seconds": wait("review_first_patch_seconds"),
    }
    out["workspace_share_of_archive"] = round(out["workspace_bytes"] / out["archive_bytes"], 5)
    for name, fit in lin.items():
        if name.startswith("tiling_seconds_run_"):
            out[f"tiling_hours_run_{name.rsplit('_', 1)[1]}"] = round(at(fit, n) / 3600, 3)
    return out


def verdicts(rows: list[dict], lin: dict, labelled: dict | None) -> list[dict]:
    """The figures with a target, each against it; the issue's targets are at the largest size."""
    big, small = rows[-1], rows[0]
    at_big = f"{big['photos']} photos"
    out = []
    runs = big["tiling"]
    out.append(
        verdict(
            "workspace_share_of_archive",
            max(t["workspace_share_of_archive"] for t in runs.values()),
            at_big,
        )
    )
    files = [max(t["workspace_files"] for t in r["tiling"].values()) for r in (small, big)]
    out.append(
        verdict(
            "workspace_files_growth",
            files[1] - files[0],
            f"{big['photos']} vs {small['photos']} photos ({files[1]} vs {files[0]} files)",
        )
    )
    for k, t in runs.items():
        out.append(
            verdict("decode_bound_share", t["decode_bound_share_per_process"], f"{at_big}, {k} w")
        )
    if "speedup_2_vs_1" in big:
        out.append(verdict("speedup_2_vs_1", big["speedup_2_vs_1"], at_big))
    for k, t in runs.items():
        out.append(verdict("peak_mb", t["peak_tree_mb"], f"{at_big}, {k} w (tree)"))
        if len(rows) > 1:
            growth = t["peak_tree_mb"] / small["tiling"][k]["peak_tree_mb"]
            out.append(
                verdict(
                    "peak_growth",
                    round(growth, 3),
                    f"{big['photos']} vs {small['photos']} photos, {k} w",
                )
            )
    out.append(verdict("status_cli_seconds", big["status"]["cli_seconds"], at_big))
    if labelled is not None:
        out.append(
            verdict(
                "crop_store_bytes_per_labelled_patch",
                labelled["crop_store_bytes_per_labelled_patch"],
                f"{labelled['patches']} patches of {labelled['photos']} photos",
            )
        )
    if len(rows) > 1:
        for k, t in runs.items():
            growth = t["s_per_photo"] / small["tiling"][k]["s_per_photo"]
            where = f"{big['photos']} vs {small['photos']} photos, tiling s/photo, {k} w"
            out.append(verdict("per_photo_growth", round(growth, 3), where))
        growth = max(t["workspace_bytes_per_photo"] for t in runs.values()) / max(
            t["workspace_bytes_per_photo"] for t in small["tiling"].values()
        )
        where = f"{big['photos']} vs {small['photos']} photos, workspace bytes/photo"
        out.append(verdict("per_photo_growth", round(growth, 3), where))
    judged = [
        name
        for name in lin
        if name in ("decode_seconds", "workspace_bytes") or name.startswith("tiling_seconds")
    ]
    worst = max(judged, key=lambda name: lin[name]["max_abs_relative_residual"])
    value = round(lin[worst]["max_abs_relative_residual"], 4) if len(rows) > 2 else None
    out.append(
        verdict(
            "linear_in_photos",
            value,
            f"largest residual: {worst}"
            if value is not None
            else "needs 3 sizes or more (two points always lie on a line)",
        )
    )
    return out


# --- report ------------------------------------------------------------------------------


def _mark(v: dict | None) -> str:
    if v is None or v["met"] is None:
        return ""
    return " (met)" if v["met"] else " (NOT met)"


def print_table(result: dict) -> None:
    a = result["archive"]
    print(
        f"\narchive: {a['photos']} JPEGs of {a['width']} x {a['height']} "
        f"({a['made']} generated, the rest derived; {a['distinct_sha256']} distinct by SHA-256), "
        f"{a['bytes'] / a['photos'] / 1e6:.2f} MB per photo; tile {result['tile_px']} px; "
        f"tiling engine {result['tiling_engine']}"
    )
    print(
        f"\n{'photos':>7}{'workers':>8}{'s/photo':>9}{'bound':>8}{'share/proc':>11}"
        f"{'KB/photo':>10}{'files':>7}{'ws/arch':>9}{'peak MB':>9}"
    )
    for r in result["sizes"]:
        for k, t in r["tiling"].items():
            share = verdict("decode_bound_share", t["decode_bound_share_per_process"])
            ws = verdict("workspace_share_of_archive", t["workspace_share_of_archive"])
            peak = verdict("peak_mb", t["peak_tree_mb"])
            print(
                f"{r['photos']:>7}{k:>8}{t['s_per_photo']:>9.3f}{r['decode_s_per_photo']:>8.3f}"
                f"{t['decode_bound_share_per_process']:>11.2f}{_mark(share)}"
                f"{t['workspace_bytes_per_photo'] / 1e3:>10.1f}{t['workspace_files']:>7}"
                f"{t['workspace_share_of_archive']:>9.4f}{_mark(ws)}"
                f"{t['peak_tree_mb']:>9.0f}{_mark(peak)}"
            )
        if "speedup_2_vs_1" in r:
            s = verdict("speedup_2_vs_1", r["speedup_2_vs_1"])
            print(f"{'':>7}  speed-up of 2 workers over 1: {r['speedup_2_vs_1']:.2f}{_mark(s)}")
        st, rv = r["status"], r["review"]
        print(
            f"{'':>7}  status: {st['cli_seconds']:.2f} s as a command "
            f"({st['library_seconds']:.3f} s in the library)"
            f"{_mark(verdict('status_cli_seconds', st['cli_seconds']))}; review: first patch "
            f"after {rv['first_patch_seconds']:.2f} s (queue of {rv['queue_length']:,})"
        )
    print(
        "  bound = plain OpenCV read + decode s/photo of the same files (one thread); "
        "share/proc = bound / (tiling s/photo x workers); ws/arch = workspace bytes / archive "
        "bytes; peak MB = the tiling process's and its workers' VmHWM added up"
    )
    lab = result.get("labelled")
    if lab:
        v = verdict(
            "crop_store_bytes_per_labelled_patch", lab["crop_store_bytes_per_labelled_patch"]
        )
        print(
            f"\nlabelled: {lab['patches']:,} patches of {lab['photos']:,} photos "
            f"({lab['photos_touched']:,} photos touched): `trainkit pick` chose them and cut "
            f"and cached {lab['pick_cached']:,} crops in {lab['pick_seconds']:.1f} s; review's "
            f"first patch after {lab['review_first_patch_seconds']:.2f} s; crop store "
            f"{lab['crop_store_bytes_per_labelled_patch'] / 1e3:.1f} KB per labelled patch"
            f"{_mark(v)}"
        )
    print("\nleast-squares line per total (slope per photo, intercept, largest |residual|):")
    for name, fit in result["linearity"].items():
        print(
            f"  {name:<28} {fit['slope']:>12.5g} {fit['intercept']:>12.5g} "
            f"{fit['max_abs_relative_residual']:>8.1%}"
        )
    e = result["extrapolated"]
    print(f"\nEXTRAPOLATED linearly to {e['photos']:,} photos (not measured):")
    for k, v in e.items():
        if k not in ("photos", "note"):
            print(f"  {k:<28} {v:,}")
    print("\ntargets:")
    for v in result["verdicts"]:
        met = {True: "met", False: "NOT met", None: "not judged"}[v["met"]]
        print(f"  {met:<10} {v['figure']} = {v['value']} ({v['where']}): {v['target']}")
    print(f"\nload average at start {result['load']['start']}, at end {result['load']['end']}")
    print(f"wall time {result['wall_minutes']} min")


def _code_version() -> dict:
    def git(*args: str) -> str:
        run = subprocess.run(
            ["git", "-C", str(REPO), *args], capture_output=True, text=True, check=False
        )
        return run.stdout.strip()

    return {"commit": git("rev-parse", "HEAD"), "dirty": bool(git("status", "--porcelain"))}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out", type=Path, help="results folder (archive.json is written there)")
    ap.add_argument("--photos", type=int, nargs="+", default=None, help="archive sizes to measure")
    ap.add_argument(
        "--quick",
        action="store_true",
        help=f"smoke run: {QUICK_PHOTOS} photos of {QUICK_MEGAPIXELS} MP, seconds",
    )
    ap.add_argument("--megapixels", type=float, default=None, help="photo size (default 12)")
    ap.add_argument(
        "--made",
        type=int,
        default=None,
        help="photos generated (default 3, --quick 2); the rest derived",
    )
    ap.add_argument("--tile-px", type=int, default=128, help="patch size in pixels")
    ap.add_argument(
        "--workers", type=int, nargs="+", default=[1, 2], help="tiling runs: worker counts"
    )
    ap.add_argument(
        "--labelled",
        type=int,
        default=None,
        help=f"patches labelled on the largest size (default {FULL_LABELLED}, "
        f"--quick {QUICK_LABELLED}; 0: none)",
    )
    ap.add_argument(
        "--json", type=Path, default=None, help="results file (default OUT/archive.json)"
    )
    ap.add_argument(
        "--scratch", type=Path, default=None, help="scratch folder (default: a temp one)"
    )
    ap.add_argument("--quiet", action="store_true")
    args = ap.parse_args(argv)
    sizes = sorted(set(args.photos or (QUICK_PHOTOS if args.quick else FULL_PHOTOS)))
    if sizes[0] < 1:
        ap.error(f"--photos: expected sizes >= 1, got {sizes[0]}")
    workers = tuple(sorted(set(args.workers)))
    if workers[0] < 1:
        ap.error(f"--workers: expected counts >= 1, got {workers[0]}")
    megapixels = args.megapixels or (QUICK_MEGAPIXELS if args.quick else 12.0)
    try:
        height, width = photo_size(megapixels)
    except ValueError as exc:
        ap.error(str(exc))
    if not (16 <= args.tile_px <= min(height, width)):
        ap.error(f"--tile-px: expected 16..{min(height, width)}, got {args.tile_px}")
    n_labelled = (
        (QUICK_LABELLED if args.quick else FULL_LABELLED)
        if args.labelled is None
        else args.labelled
    )
    args.out.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    load_start = load()
    with tempfile.TemporaryDirectory(prefix="trainkit-archive-", dir=args.scratch) as name:
        scratch = Path(name)
        say(args.quiet, f"making an archive of {sizes[-1]} photos in {scratch} ...")
        archive = make_archive(
            scratch / "archive",
            sizes[-1],
            megapixels=megapixels,
            made=args.made or (2 if args.quick else 3),
            quiet=args.quiet,
        )
        # the archive's gigabytes were just written: let the writeback finish before
        # anything is timed, or the first size measured pays for it
        os.sync()
        time.sleep(5.0)
        load_start = load()
        rows, kept = [], None
        for n in sizes:
            say(args.quiet, f"measuring {n} photos ...")
            row, kept = measure_size(
                archive["paths"][:n],
                scratch / "archive",
                scratch,
                tile_px=args.tile_px,
                workers=workers,
                keep_last=n == sizes[-1] and n_labelled > 0,
                quiet=args.quiet,
            )
            rows.append(row)
        labelled = None
        if kept is not None:
            say(args.quiet, f"labelling {n_labelled} patches of {sizes[-1]} photos ...")
            labelled = label_patches(kept, n_labelled, scratch, photos=sizes[-1])
    load_end = load()
    lin = linearity(rows)
    engines = {json.dumps(t["engine"], sort_keys=True) for r in rows for t in r["tiling"].values()}
    result = {
        "benchmark": "archive",
        "mode": "quick" if args.quick else "full",
        "caution": CAUTION,
        "issue": 22,
        "what": "tiling an archive (tile_into_workspace, the library call behind `trainkit "
        "tile`, with its default engine) against the plain OpenCV JPEG decode of the same "
        "files measured in the same run; workspace census, memory of the process tree, "
        "status, opening review, labelled-patch cost; a least-squares line per total",
        "code": _code_version(),
        "machine": {
            "cpu_count": os.cpu_count(),
            "note": "shared with other work; ratios are the figures, seconds depend on the load",
        },
        "load": {"start": load_start, "end": load_end},
        "tile_px": args.tile_px,
        "tiling_engine": json.loads(engines.pop()) if len(engines) == 1 else sorted(engines),
        "peak_memory_covers": "peak_tree_mb: the tiling process and every process below "
        "it (pool workers and their server), each one's own high-water mark (VmHWM, read "
        f"from /proc every {SAMPLE_INTERVAL} s; the tiling process's final one) added up, an "
        "upper bound of what they held at once; peak_tree_sampled_mb: the highest sum of "
        "their VmRSS at one sample; peak_tiling_process_mb: the tiling process alone "
        "(VmHWM); MB = MiB; shared pages count once per process",
        "photo_sizes_measured": sizes,
        "archive": {
            "photos": sizes[-1],
            "made": archive["made"],
            "derived": sizes[-1] - archive["made"],
            "height": archive["height"],
            "width": archive["width"],
            "megapixels": round(archive["height"] * archive["width"] / 1e6, 2),
            "bytes": archive["bytes"],
            "distinct_sha256": archive["distinct_sha256"],
            "seconds_to_make": archive["seconds"],
        },
        "sizes": rows,
        "labelled": labelled,
        "linearity": lin,
        "extrapolated": extrapolation(lin),
        "verdicts": verdicts(rows, lin, labelled),
        "wall_minutes": round((time.perf_counter() - t0) / 60, 2),
    }
    from trainkit.core.fsutil import atomic_write_json

    target = args.json or (args.out / "archive.json")
    atomic_write_json(target, result, indent=2)
    if not args.quiet:
        print_table(result)
        print(f"results -> {target}")
    return 0


if __name__ == "__main__":
    sys.path.insert(0, str(REPO))
    raise SystemExit(main())
