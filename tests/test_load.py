"""Load: a scan over 2,000 frames and a tile run over 500 photos, right counts, bounded memory.

Each run happens in a fresh `python -c` process that reports its own peak resident memory
(VmHWM in /proc/self/status, Linux proc(5)), so the figure is that run's alone.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

pytestmark = pytest.mark.skipif(
    not Path("/proc/self/status").exists(), reason="peak memory is read from /proc (Linux)"
)

PEAK_LIMIT_MB = 600  # generous: interpreter, numpy, Pillow, OpenCV, ONNX Runtime and the run

PEAK = """
def peak_mb():
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024  # kB
"""


def run_measured(code: str, timeout: float = 120) -> dict:
    """Run code (which sets `result`) in a fresh interpreter; returns result plus peak_mb."""
    script = PEAK + code + "\nresult['peak_mb'] = peak_mb()\nprint(json.dumps(result))\n"
    out = subprocess.run(
        [sys.executable, "-c", "import json\n" + script],
        capture_output=True,
        text=True,
        timeout=timeout,
        check=True,
        env={**os.environ, "OMP_NUM_THREADS": "1"},
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def write_pngs(folder: Path, n: int, h: int, w: int, dark_every: int = 0) -> None:
    """n small PNGs with distinct content; every dark_every-th one dark (grey 60), others 200."""
    folder.mkdir(parents=True)
    ramp = (np.arange(w, dtype=np.uint8) % 16)[None, :, None]
    for i in range(n):
        base = 60 if dark_every and i % dark_every == 0 else 200
        arr = np.broadcast_to(base + ramp, (h, w, 3)).copy()
        arr[0, 0] = [i % 256, i // 256, 7]  # distinct content hash per file
        Image.fromarray(arr).save(folder / f"f{i:04d}.png", compress_level=1)


def test_scan_of_2000_frames_has_every_frame_once_in_bounded_memory(tmp_path):
    from test_screener import brightness_model

    model = brightness_model(tmp_path / "m.onnx", patch_px=32, threshold=0.5)
    frames = tmp_path / "frames"
    write_pngs(frames, 2000, 64, 64, dark_every=4)
    out = tmp_path / "out"
    res = run_measured(
        "import time\n"
        "from pathlib import Path\n"
        "from trainkit.screener.scan import scan_frames\n"
        "t0 = time.perf_counter()\n"
        f"result = scan_frames({str(model)!r}, [Path({str(frames)!r})], {str(out)!r}, "
        "overlays='none')\n"
        "result['wall'] = time.perf_counter() - t0\n",
        timeout=300,
    )
    print(f"scan 2000 frames: {res['wall']:.1f} s, peak {res['peak_mb']:.0f} MB")
    recs = [json.loads(x) for x in (out / "frames.jsonl").read_text().splitlines()]
    assert len(recs) == 2000
    assert sorted(r["frame"] for r in recs) == sorted(str(p) for p in frames.iterdir())
    assert all(r["status"] == "ok" for r in recs)
    assert res["frames"] == res["scanned"] == 2000 and res["errors"] == 0
    # Brightness model: P(crack) = softmax([(m-128)/10, (128-m)/10])[1] = 1/(1+exp((m-128)/5)):
    # grey ~60 gives 1/(1+e^-13.6) > 0.99, grey ~200 gives < 0.01, so exactly the dark quarter.
    assert 1 / (1 + math.exp((60 + 7.5 - 128) / 5)) > 0.99
    assert 1 / (1 + math.exp((200 - 128) / 5)) < 0.01
    flagged = sorted(Path(r["frame"]).name for r in recs if r["flagged"])
    assert flagged == [f"f{i:04d}.png" for i in range(0, 2000, 4)]
    assert res["flagged"] == 500
    assert res["peak_mb"] < PEAK_LIMIT_MB


def test_tile_of_500_photos_has_the_right_counts_in_bounded_memory(tmp_path):
    photos = tmp_path / "photos"
    write_pngs(photos, 500, 120, 160)
    ws = tmp_path / "ws"
    res = run_measured(
        "import time\n"
        "from pathlib import Path\n"
        "from trainkit.core.decode import find_images\n"
        "from trainkit.core.taxonomy import load_class_set\n"
        "from trainkit.intake.tiling import tile_into_workspace\n"
        "from trainkit.store.workspace import Workspace\n"
        "t0 = time.perf_counter()\n"
        f"found = find_images([Path({str(photos)!r})])\n"
        f"ws = Workspace.create({str(ws)!r}, class_set=load_class_set('presence'), tile_px=64)\n"
        "r = tile_into_workspace([p for p, _ in found], ws, roots=dict(found))\n"
        "result = {k: v for k, v in r.items() if k != 'problems'}\n"
        "result['problems'] = len(r['problems'])\n"
        "result['wall'] = time.perf_counter() - t0\n",
        timeout=300,
    )
    print(f"tile 500 photos: {res['wall']:.1f} s, peak {res['peak_mb']:.0f} MB")
    # Border rule (tiling module docstring): ceil(120 / 64) = 2 rows, ceil(160 / 64) = 3 columns.
    per_photo = math.ceil(120 / 64) * math.ceil(160 / 64)
    assert per_photo == 6
    assert res["photos_added"] == 500 and res["photos_skipped"] == 0 and res["problems"] == 0
    assert res["patches_added"] == 500 * per_photo

    from trainkit.store.workspace import Workspace

    w = Workspace.open(ws)
    assert sorted(r["name"] for r in w.photos()) == sorted(p.name for p in photos.iterdir())
    assert len(w.patches()) == 3000
    assert not (ws / "patches").exists()  # patches by reference: no file per patch
    assert res["peak_mb"] < PEAK_LIMIT_MB
