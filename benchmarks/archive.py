"""Archive baseline: what tiling a firm's photo archive costs today, against the JPEG-decode bound.

Everything is invented with the kit's own generator (trainkit.synth; no real photos):

1. An archive of synthetic JPEGs (12 megapixels by default, 4000 x 3000) in a scratch
   folder outside the repository: a few photos made by ``generate_photo`` and the rest
   derived from them cheaply (a flip, a circular shift and a brightness step, each
   re-encoded at JPEG quality 90), every file distinct by SHA-256 (checked).
2. For each archive size N (the first N files), in the same run, each in its own process:
   (a) the plain decode bound: reading and decoding the same N files one after another
       with ``trainkit.core.decode.read_rgb_fast`` (OpenCV's decoder, one thread) and with
       ``read_rgb`` (Pillow, the decoder tiling uses today);
   (b) ``tile_into_workspace`` (the library call behind ``trainkit tile``) into a new
       workspace with workers=1 and workers=2 in its default parallel mode (threads, what
       the CLI uses), and workers=2 with ``parallel="processes"`` (run ``2p``): seconds
       per photo and the decode bound's share of it (bound seconds / tiling seconds);
   (c) the workspace's bytes and files, per photo and as a share of the archive's bytes;
   (d) the peak resident memory (VmHWM) of each of those processes;
   (e) the wall time of ``python -m trainkit status WS`` on the finished workspace
       (interpreter start-up included, as a user sees it).
   The printed table extrapolates each total linearly (a least-squares line over the
   sizes) to 40,000 photos; that is an extrapolation, not a measurement.

Issue 22 targets (for the next session; today's code is not expected to meet them):
workspace before labelling <= 2 % of the archive's bytes in a bounded number of files;
tiling >= 0.7 of the decode bound per process and >= 1.7x faster with 2 processes than
with 1 on 2 cores; memory flat in archive size; ``status`` on 2,000 photos in < 2 s.

All figures are ratios measured side by side on one machine; absolute seconds depend on
the machine and its load (the shared 2-core machine had other work running).

Usage: python benchmarks/archive.py OUT [--photos N [N ...]] [--quick] [--megapixels MP]
       [--made K] [--tile-px PX] [--runs 1 2 2p] [--json PATH] [--scratch DIR] [--quiet]

OUT receives ``archive.json`` (or --json PATH); the archive and the workspaces live in a
temporary folder (or --scratch DIR) that is removed at the end.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import math
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
RESULTS = REPO / "benchmarks" / "results" / "archive_baseline.json"

#: What every results file of this benchmark says first.
CAUTION = (
    "The screener is a triage aid, not an inspection; these figures hold only for photos "
    "like the synthetic ones made here; defer to local codes and licensed engineers."
)
#: Archive size the printed table extrapolates to (issue 22: 20 jobs x 2,000 frames).
EXTRAPOLATE_TO = 40_000
#: Seed of the first made photo; made photo k uses SEED + k.
SEED = 220_022
#: Default sizes of a full run and of --quick.
FULL_PHOTOS = (20, 60)
QUICK_PHOTOS = (3,)
QUICK_MEGAPIXELS = 0.5


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


# --- measurements, each in its own process ----------------------------------------------

_PEAK = """
def _peak_mb():
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    import resource
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
"""

_DECODE_CHILD = (
    _PEAK
    + """
import json, sys, time
from pathlib import Path
import cv2
from trainkit.core.decode import read_rgb, read_rgb_fast
cv2.setNumThreads(1)
paths = [Path(p) for p in json.loads(sys.argv[1])]
out = {}
for name, fn in (("opencv", read_rgb_fast), ("pillow", read_rgb)):
    t0 = time.perf_counter()
    for p in paths:
        data = p.read_bytes()
        fn(p, data=data)
    out[name] = time.perf_counter() - t0
out["peak_mb"] = _peak_mb()
print(json.dumps(out))
"""
)

_TILE_CHILD = (
    _PEAK
    + """
import json, sys, time
from pathlib import Path
from trainkit.core.taxonomy import load_class_set
from trainkit.intake.tiling import tile_into_workspace
from trainkit.store.workspace import Workspace
a = json.loads(sys.argv[1])
paths = [Path(p) for p in a["paths"]]
root = Path(a["root"])
ws = Workspace.create(Path(a["ws"]), class_set=load_class_set("presence"), tile_px=a["tile_px"])
t0 = time.perf_counter()
res = tile_into_workspace(paths, ws, workers=a["workers"], parallel=a["parallel"],
                          roots={p: root for p in paths})
wall = time.perf_counter() - t0
print(json.dumps({"seconds": wall, "peak_mb": _peak_mb(), "photos_added": res["photos_added"],
                  "patches_added": res["patches_added"], "decode_share": res["decode_share"],
                  "problems": res["problems"]}))
"""
)


def _child(code: str, arg: dict | list) -> dict:
    env = {
        **os.environ,
        "PYTHONPATH": os.pathsep.join([str(REPO), os.environ.get("PYTHONPATH", "")]),
    }
    run = subprocess.run(
        [sys.executable, "-c", code, json.dumps(arg)],
        capture_output=True,
        text=True,
        env=env,
        check=False,
    )
    if run.returncode != 0:
        raise RuntimeError(f"measurement process failed:\n{run.stderr[-2000:]}")
    return json.loads(run.stdout.strip().splitlines()[-1])


def time_status(ws: Path) -> float:
    """Wall seconds of ``python -m trainkit status WS`` (start-up included)."""
    env = {
        **os.environ,
        "PYTHONPATH": os.pathsep.join([str(REPO), os.environ.get("PYTHONPATH", "")]),
    }
    t0 = time.perf_counter()
    run = subprocess.run(
        [sys.executable, "-m", "trainkit", "status", str(ws)],
        capture_output=True,
        text=True,
        env=env,
        check=False,
    )
    seconds = time.perf_counter() - t0
    if run.returncode != 0:
        raise RuntimeError(f"trainkit status failed: {run.stderr.strip()[-500:]}")
    return seconds


def measure_size(
    paths: list[Path], archive_root: Path, scratch: Path, *, tile_px: int, runs: tuple[str, ...]
) -> dict:
    """All figures for one archive size: the decode bound, then tiling with each worker count."""
    n = len(paths)
    archive_bytes = sum(p.stat().st_size for p in paths)
    dec = _child(_DECODE_CHILD, [str(p) for p in paths])
    bound = dec["opencv"] / n
    row: dict = {
        "photos": n,
        "archive_bytes": archive_bytes,
        "decode_s_per_photo": {"opencv": round(bound, 4), "pillow": round(dec["pillow"] / n, 4)},
        "decode_peak_mb": round(dec["peak_mb"], 1),
        "tiling": {},
    }
    for k in runs:
        ws = scratch / f"ws_{n}_w{k}"
        t = _child(
            _TILE_CHILD,
            {
                "paths": [str(p) for p in paths],
                "root": str(archive_root),
                "ws": str(ws),
                "tile_px": tile_px,
                "workers": int(k.rstrip("p")),
                "parallel": "processes" if k.endswith("p") else "threads",
            },
        )
        if t["photos_added"] != n:
            raise RuntimeError(f"tiling added {t['photos_added']} of {n} photos: {t['problems']}")
        ws_bytes, ws_files = folder_usage(ws)
        status_s = time_status(ws)
        per_photo = t["seconds"] / n
        row["tiling"][str(k)] = {
            "workers": int(k.rstrip("p")),
            "parallel": "processes" if k.endswith("p") else "threads",
            "seconds": round(t["seconds"], 3),
            "s_per_photo": round(per_photo, 4),
            "decode_bound_share": round(bound / per_photo, 4),
            "decode_share_inside_tiling": t["decode_share"],
            "patches": t["patches_added"],
            "peak_mb": round(t["peak_mb"], 1),
            "peak_mb_covers": "the tiling process only (not its worker processes)"
            if k.endswith("p")
            else "the tiling process (its worker threads included)",
            "workspace_bytes": ws_bytes,
            "workspace_files": ws_files,
            "workspace_bytes_per_photo": round(ws_bytes / n),
            "workspace_files_per_photo": round(ws_files / n, 2),
            "workspace_share_of_archive": round(ws_bytes / archive_bytes, 4),
            "status_seconds": round(status_s, 3),
        }
        shutil.rmtree(ws)
    for two in ("2", "2p"):
        if "1" in row["tiling"] and two in row["tiling"]:
            row[f"speedup_{two}_vs_1"] = round(
                row["tiling"]["1"]["seconds"] / row["tiling"][two]["seconds"], 3
            )
    return row


def extrapolate(sizes: list[int], totals: list[float], to: int = EXTRAPOLATE_TO) -> float:
    """A least-squares line through (size, total) evaluated at ``to`` (one size: through 0)."""
    if len(sizes) == 1:
        return totals[0] / sizes[0] * to
    slope, intercept = np.polyfit(np.asarray(sizes, float), np.asarray(totals, float), 1)
    return float(slope * to + intercept)


def extrapolation(rows: list[dict]) -> dict:
    """Each total extrapolated linearly to :data:`EXTRAPOLATE_TO` photos, per worker count."""
    sizes = [r["photos"] for r in rows]
    out = {
        "photos": EXTRAPOLATE_TO,
        "note": "linear extrapolation (least-squares line over the measured sizes), "
        "not a measurement",
        "archive_bytes": round(extrapolate(sizes, [r["archive_bytes"] for r in rows])),
    }
    for k in rows[0]["tiling"]:
        t = [r["tiling"][k] for r in rows]
        out[f"run_{k}"] = {
            "tiling_hours": round(extrapolate(sizes, [x["seconds"] for x in t]) / 3600, 2),
            "workspace_bytes": round(extrapolate(sizes, [x["workspace_bytes"] for x in t])),
            "workspace_files": round(extrapolate(sizes, [x["workspace_files"] for x in t])),
        }
    out["decode_bound_hours_opencv"] = round(
        extrapolate(sizes, [r["decode_s_per_photo"]["opencv"] * r["photos"] for r in rows]) / 3600,
        2,
    )
    return out


# --- report ------------------------------------------------------------------------------


def _gb(n: float) -> str:
    return f"{n / 1e9:.3g} GB"


def print_table(result: dict) -> None:
    a = result["archive"]
    print(
        f"\narchive: {a['photos']} JPEGs of {a['width']} x {a['height']} "
        f"({a['made']} generated, the rest derived; {a['distinct_sha256']} distinct by SHA-256), "
        f"{a['bytes'] / a['photos'] / 1e6:.2f} MB per photo; tile {result['tile_px']} px"
    )
    print(
        f"\n{'photos':>7}{'run':>8}{'s/photo':>9}{'bound':>8}{'share':>7}{'MB/photo':>10}"
        f"{'files/ph':>9}{'ws/arch':>9}{'peak MB':>9}{'status s':>9}"
    )
    for r in result["sizes"]:
        for k, t in r["tiling"].items():
            print(
                f"{r['photos']:>7}{k:>8}{t['s_per_photo']:>9.3f}"
                f"{r['decode_s_per_photo']['opencv']:>8.3f}{t['decode_bound_share']:>7.2f}"
                f"{t['workspace_bytes_per_photo'] / 1e6:>10.2f}{t['workspace_files_per_photo']:>9.0f}"
                f"{t['workspace_share_of_archive']:>8.1f}x{t['peak_mb']:>9.0f}{t['status_seconds']:>9.2f}"
            )
        for two in ("2", "2p"):
            if f"speedup_{two}_vs_1" in r:
                print(f"{'':>7}  speed-up of run {two} over run 1: {r[f'speedup_{two}_vs_1']:.2f}")
    print(
        "  bound = OpenCV decode s/photo of the same files (one thread); share = bound / tiling "
        "s/photo (target >= 0.7); ws/arch = workspace bytes / archive bytes (target <= 0.02);"
        " run 1 / 2: workers, threads (the CLI's mode); 2p: 2 worker processes; speed-up target"
        " >= 1.7"
    )
    e = result["extrapolated"]
    print(
        f"\nEXTRAPOLATED linearly to {e['photos']:,} photos (not measured): archive {_gb(e['archive_bytes'])}"
    )
    for k, v in e.items():
        if k.startswith("run_"):
            print(
                f"  run {k[4:]}: tiling {v['tiling_hours']:.1f} h, workspace "
                f"{_gb(v['workspace_bytes'])} in {v['workspace_files']:,} files"
            )
    print(f"  decode bound (OpenCV, one process): {e['decode_bound_hours_opencv']:.1f} h")
    print(f"\nwall time {result['wall_minutes']} min")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out", type=Path, help="results folder (archive.json is written there)")
    ap.add_argument("--photos", type=int, nargs="+", default=None, help="archive sizes to measure")
    ap.add_argument(
        "--quick", action="store_true", help=f"smoke run: {QUICK_PHOTOS} small photos, seconds"
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
        "--runs",
        nargs="+",
        default=["1", "2", "2p"],
        help="tiling runs: a worker count, with 'p' for processes instead of threads",
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
    bad = [k for k in args.runs if not re.fullmatch(r"[1-9][0-9]*p?", k)]
    if bad:
        ap.error(f"--runs: expected worker counts like 1, 2 or 2p, got {' '.join(bad)}")
    megapixels = args.megapixels or (QUICK_MEGAPIXELS if args.quick else 12.0)
    try:
        height, width = photo_size(megapixels)
    except ValueError as exc:
        ap.error(str(exc))
    if not (16 <= args.tile_px <= min(height, width)):
        ap.error(f"--tile-px: expected 16..{min(height, width)}, got {args.tile_px}")
    args.out.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    scratch_cm = tempfile.TemporaryDirectory(prefix="trainkit-archive-", dir=args.scratch)
    with scratch_cm as scratch_name:
        scratch = Path(scratch_name)
        say(args.quiet, f"making an archive of {sizes[-1]} photos in {scratch} ...")
        archive = make_archive(
            scratch / "archive",
            sizes[-1],
            megapixels=megapixels,
            made=args.made or (2 if args.quick else 3),
            quiet=args.quiet,
        )
        rows = []
        for n in sizes:
            say(
                args.quiet,
                f"measuring {n} photos (decode bound, tiling runs {' '.join(args.runs)}) ...",
            )
            rows.append(
                measure_size(
                    archive["paths"][:n],
                    scratch / "archive",
                    scratch,
                    tile_px=args.tile_px,
                    runs=tuple(args.runs),
                )
            )
    result = {
        "benchmark": "archive",
        "mode": "quick" if args.quick else "full",
        "caution": CAUTION,
        "issue": 22,
        "what": "baseline of today's tiling (tile_into_workspace; runs '1' and '2' use its "
        "default threads, what `trainkit tile` uses, '2p' two processes) against the plain "
        "JPEG decode bound of the same files, measured in the same run",
        "machine": {"cpu_count": os.cpu_count(), "note": "shared; ratios only"},
        "tile_px": args.tile_px,
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
        "extrapolated": extrapolation(rows),
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
