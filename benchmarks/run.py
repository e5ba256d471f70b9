"""Side-by-side performance ratios, measured in one run (the machine is shared and noisy).

Run with `make bench`. Each benchmark times two variants alternately, several
rounds each, and reports the median of each and their ratio; absolute numbers
vary from run to run, ratios much less.

1. training step of the demo network: the channels-last view that Preprocess's
   permute gives (what the kit uses) versus a contiguous NCHW copy;
2. inference: ONNX Runtime on the exported screener versus PyTorch eager, same patches;
3. tiling 12-megapixel JPEGs into a workspace: photos per second with one worker and with
   one worker per core, and the share of worker time spent decoding;
4. scanning 12-megapixel JPEGs: `trainkit scan` as a whole command against the model-only
   bound (ONNX Runtime on patches already in memory) and against a plain PyTorch loop
   (PIL decode, crop, torchvision transforms, eager model, one batch per frame);
5. training (benchmarks/train_bench.py): `trainkit.learning.training.train` against a plain
   ImageFolder/DataLoader loop (2 workers and 0) on the same patches, both against the
   model-only bound, with the held-out accuracy each reaches in the same wall time;
6. the unfamiliar-surface output: ONNX Runtime on the exported demo network with and
   without the familiarity ensemble (stage taps + per-layer Mahalanobis), same patches.

`python benchmarks/run.py [memory_format|inference|tiling|scan|training|familiarity ...]`
runs a subset;
`--quick` runs the training subset at smoke-test size (under a minute).
"""

from __future__ import annotations

import json
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import torch
from train_bench import bench_training


def alternate(fns: dict, rounds: int = 7) -> dict:
    times = {k: [] for k in fns}
    for _ in range(rounds):
        for k, f in fns.items():
            t0 = time.perf_counter()
            f()
            times[k].append(time.perf_counter() - t0)
    return {k: statistics.median(v) for k, v in times.items()}


def bench_memory_format(batch: int = 32, size: int = 128) -> dict:
    from trainkit.learning.models import create_model

    torch.manual_seed(0)
    model = create_model("tiny_cnn", 6)
    opt = torch.optim.AdamW(model.parameters())
    x = torch.randn(batch, size, size, 3)
    y = torch.randint(0, 6, (batch,))

    def step(inp):
        loss = torch.nn.functional.cross_entropy(model(inp), y)
        opt.zero_grad()
        loss.backward()
        opt.step()

    med = alternate(
        {
            "contiguous": lambda: step(x.permute(0, 3, 1, 2).contiguous()),
            "channels_last_view": lambda: step(x.permute(0, 3, 1, 2)),
        }
    )
    return {
        "what": f"tiny_cnn training step, batch {batch}, {size} px",
        "images_per_second": {k: round(batch / v, 1) for k, v in med.items()},
        "speedup_of_view_over_copy": round(med["contiguous"] / med["channels_last_view"], 2),
    }


def bench_onnx_vs_torch(n: int = 256, size: int = 128) -> dict:
    import onnx
    import onnxruntime as ort

    from trainkit.export.onnx_file import _wrapper, network_to_onnx
    from trainkit.learning.config import load_train_config
    from trainkit.learning.network import build_network

    torch.manual_seed(0)
    network = build_network(load_train_config("demo"), 6, load_weights=False).eval()
    net = _wrapper(network)
    images = np.random.default_rng(0).integers(0, 256, (n, size, size, 3), dtype=np.uint8)
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "m.onnx"
        onnx.save(network_to_onnx(network, size), str(path))
        sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])

        def run_torch():
            with torch.no_grad():
                for i in range(0, n, 64):
                    net(torch.from_numpy(images[i : i + 64]))

        def run_ort():
            for i in range(0, n, 64):
                sess.run(None, {"image": images[i : i + 64]})

        med = alternate({"onnxruntime": run_ort, "pytorch": run_torch}, rounds=5)
    return {
        "what": f"demo network inference, {n} patches of {size} px, batch 64",
        "patches_per_second": {k: round(n / v, 1) for k, v in med.items()},
        "speedup_onnxruntime": round(med["pytorch"] / med["onnxruntime"], 2),
    }


def bench_tiling(n_photos: int = 12, rounds: int = 2) -> dict:
    """12-Mpx JPEGs (synthetic concrete upscaled to 4000 x 3000 plus noise) tiled at 224 px."""
    import shutil

    import cv2
    from PIL import Image

    from trainkit.core.cores import usable_cores
    from trainkit.core.taxonomy import load_class_set
    from trainkit.intake.tiling import tile_into_workspace
    from trainkit.store.workspace import Workspace
    from trainkit.synth import SynthOptions, generate_photo

    cores = usable_cores()
    with tempfile.TemporaryDirectory() as d:
        root = Path(d)
        photos = []
        rng = np.random.default_rng(0)
        for i in range(n_photos):
            small = generate_photo(1000 + i, SynthOptions(height=750, width=1000)).image
            big = cv2.resize(small, (4000, 3000), interpolation=cv2.INTER_CUBIC)
            big = np.clip(big + rng.normal(0, 3, big.shape), 0, 255).astype(np.uint8)
            p = root / f"frame-{i:02d}.jpg"
            Image.fromarray(big).save(p, quality=92)
            photos.append(p)
        out: dict = {}
        variants = [
            ("1 worker, tiff crops", 1, "tiff", "threads"),
            (f"{cores} threads, tiff crops", cores, "tiff", "threads"),
            (f"{cores} processes, tiff crops", cores, "tiff", "processes"),
            (f"{cores} threads, png crops", cores, "png", "threads"),
        ]
        for _ in range(rounds):
            for name, workers, fmt, mode in variants:
                ws_dir = root / "ws"
                shutil.rmtree(ws_dir, ignore_errors=True)
                ws = Workspace.create(ws_dir, class_set=load_class_set("orientation"), tile_px=224)
                res = tile_into_workspace(
                    photos, ws, workers=workers, crop_format=fmt, parallel=mode
                )
                if name not in out or res["photos_per_second"] > out[name]["photos_per_second"]:
                    out[name] = res
    one = out["1 worker, tiff crops"]
    return {
        "what": f"{n_photos} JPEGs of 4000 x 3000 px tiled at 224 px (best of {rounds})",
        "photos_per_second": {k: v["photos_per_second"] for k, v in out.items()},
        "patches_per_photo": one["patches_added"] // n_photos,
        "decode_share_of_worker_time": one["decode_share"],
        "speedup_threads": round(
            out[f"{cores} threads, tiff crops"]["photos_per_second"] / one["photos_per_second"], 2
        ),
        "speedup_tiff_over_png": round(
            out[f"{cores} threads, tiff crops"]["photos_per_second"]
            / out[f"{cores} threads, png crops"]["photos_per_second"],
            2,
        ),
    }


def _random_screener(path: Path, backbone: str = "mobilenet_v3_small", px: int = 224) -> None:
    """A randomly initialised network exported with trainkit's contract (speed only, not accuracy)."""
    import onnx

    from trainkit.export.onnx_file import network_to_onnx
    from trainkit.learning.config import load_train_config
    from trainkit.learning.network import build_network

    torch.manual_seed(0)
    cfg = load_train_config("default", {"backbone": backbone})
    model = network_to_onnx(build_network(cfg, 6, load_weights=False).eval(), px)
    names = ["none", "horizontal", "diagonal_rising", "vertical", "diagonal_falling", "map"]
    onnx.helper.set_model_props(
        model,
        {
            "trainkit.format": "trainkit-screener-1",
            "class_names": json.dumps(names),
            "angle_centres": json.dumps([None, 0.0, 45.0, 90.0, 135.0, None]),
            "patch_px": str(px),
            "threshold": "0.5",
            "patch_mm": "null",
        },
    )
    onnx.save(model, str(path))


def _model_only_bound(model: Path, patches: np.ndarray, per_frame: int) -> dict:
    """Frames per second of ONNX Runtime alone on in-memory patches, per configuration.

    "intra-N bs B": one session with N intra-op threads, batches of B in turn.
    "parallel-N bs B": N batches of B at a time on a one-thread session (the Screener's way).
    Each configuration is timed twice, interleaved, and its best time is kept.
    """
    from concurrent.futures import ThreadPoolExecutor

    import onnxruntime as ort

    from trainkit.core.cores import usable_cores

    cores = usable_cores()
    single = ort.InferenceSession(str(model), providers=["CPUExecutionProvider"])
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    one = ort.InferenceSession(str(model), opts, providers=["CPUExecutionProvider"])
    pool = ThreadPoolExecutor(cores)

    def run_single(bs):
        for i in range(0, len(patches), bs):
            single.run(None, {"image": patches[i : i + bs]})

    def run_parallel(bs):
        chunks = [patches[i : i + bs] for i in range(0, len(patches), bs)]
        list(pool.map(lambda c: one.run(None, {"image": c}), chunks))

    configs = {f"intra-{cores} bs {bs}": (run_single, bs) for bs in (16, 64, 252)}
    configs.update({f"parallel-{cores} bs {bs}": (run_parallel, bs) for bs in (8, 16)})
    best: dict[str, float] = {}
    for _ in range(2):
        for name, (fn, bs) in configs.items():
            t0 = time.perf_counter()
            fn(bs)
            fps = (len(patches) / per_frame) / (time.perf_counter() - t0)
            best[name] = max(best.get(name, 0.0), fps)
    pool.shutdown()
    return best


def bench_scan(
    n_frames: int = 24, rounds: int = 2, backbone: str | None = None, px: int = 128
) -> dict:
    """trainkit scan on 12-Mpx JPEGs against the model-only bound and a plain PyTorch loop.

    The network is the default recipe's backbone (EfficientNet-Lite0) at its 128-px
    patch size unless told otherwise; the same network runs in all three.
    """
    import subprocess

    import cv2
    from PIL import Image

    from trainkit.synth import SynthOptions, generate_photo

    with tempfile.TemporaryDirectory() as d:
        root = Path(d)
        from trainkit.core.grid import axis_starts
        from trainkit.learning.config import load_train_config

        backbone = backbone or load_train_config("default").backbone
        model = root / "m.onnx"
        _random_screener(model, backbone=backbone, px=px)
        frames = root / "frames"
        frames.mkdir()
        rng = np.random.default_rng(0)
        for i in range(n_frames):
            small = generate_photo(2000 + i, SynthOptions(height=750, width=1000)).image
            big = cv2.resize(small, (4000, 3000), interpolation=cv2.INTER_CUBIC)
            big = np.clip(big + rng.normal(0, 3, big.shape), 0, 255).astype(np.uint8)
            Image.fromarray(big).save(frames / f"f{i:02d}.jpg", quality=92)
        # cells on 4000 x 3000, last row and column shifted inward
        per_frame = len(axis_starts(4000, px, px)) * len(axis_starts(3000, px, px))

        # 1) model-only bound: patches already in memory, the best of several ways to run
        # ONNX Runtime (one session with intra-op threads on all cores, or batches run
        # concurrently on one-thread sessions as the Screener does) and batch sizes.
        # 2) the whole command, in a child process. Peak memory is the child's own VmHWM
        # (ru_maxrss of children would include the pages of this large parent at fork).
        # The two alternate over `rounds`, and each keeps its best: the same statistic for both.
        patches = rng.integers(0, 256, (per_frame * 2, px, px, 3), dtype=np.uint8)
        wrapper = (
            "import sys; from trainkit.cli import main; code = main(sys.argv[1:]); "
            "hwm = [ln for ln in open('/proc/self/status') if ln.startswith('VmHWM')][0]; "
            "print(hwm.split()[1], file=sys.stderr); sys.exit(code)"
        )
        bound: dict[str, float] = {}
        scan_runs, peak_mb = [], 0.0
        for r in range(rounds):
            for name, fps in _model_only_bound(model, patches, per_frame).items():
                bound[name] = max(bound.get(name, 0.0), fps)
            t0 = time.perf_counter()
            child = subprocess.run(
                [
                    sys.executable,
                    "-c",
                    wrapper,
                    "-q",
                    "scan",
                    str(frames),
                    "--model",
                    str(model),
                    "--out",
                    str(root / f"out-{r}"),
                    "--overlays",
                    "none",
                ],
                check=True,
                capture_output=True,
                text=True,
            )
            scan_runs.append(n_frames / (time.perf_counter() - t0))
            peak_mb = max(peak_mb, int(child.stderr.strip().splitlines()[-1]) / 1024)
        best_cfg = max(bound, key=bound.get)
        scan_fps = max(scan_runs)

        # 3) plain reference: PIL decode, crop each patch, torchvision transforms, eager model
        from torchvision import transforms

        from trainkit.learning.models import create_model

        torch.manual_seed(0)
        net = create_model(backbone, 6).eval()
        tf = transforms.Compose(
            [
                transforms.ToTensor(),
                transforms.Normalize((0.485, 0.456, 0.406), (0.229, 0.224, 0.225)),
            ]
        )
        t0 = time.perf_counter()
        ref_frames = min(n_frames, 3)
        for f in sorted(frames.iterdir())[:ref_frames]:
            im = Image.open(f).convert("RGB")
            w, h = im.size
            crops = [
                tf(im.crop((x, y, x + px, y + px)))
                for y in axis_starts(h, px, px)
                for x in axis_starts(w, px, px)
            ]
            with torch.no_grad():
                torch.softmax(net(torch.stack(crops)), 1)
        ref_fps = ref_frames / (time.perf_counter() - t0)
    return {
        "what": f"{n_frames} JPEG frames of 4000 x 3000 px, {backbone} at {px} px "
        f"({per_frame} cells per frame, random weights)",
        "model_only_bound_frames_per_second": round(bound[best_cfg], 3),
        "bound_configuration": best_cfg,
        "bound_by_configuration": {k: round(v, 3) for k, v in bound.items()},
        "scan_frames_per_second": round(scan_fps, 3),
        "scan_frames_per_second_each_round": [round(v, 3) for v in scan_runs],
        "scan_share_of_bound": round(scan_fps / bound[best_cfg], 3),
        "reference_frames_per_second": round(ref_fps, 3),
        "speedup_over_reference": round(scan_fps / ref_fps, 2),
        "scan_peak_memory_mb": round(peak_mb, 1),
        "note": "scan is timed as the whole command, including interpreter start-up and model load",
    }


def bench_train_step(batch: int = 32, size: int = 224, rounds: int = 5) -> dict:
    """MobileNetV3-Small training step at 224 px: eager, channels-last weights, torch.compile, bf16.

    Decides the kit's defaults: what is not measurably faster here stays an opt-in.
    bf16 autocast is measured only where the CPU has native bfloat16 (it is emulated,
    and refused by the kit, elsewhere).
    """
    from trainkit.learning.config import TrainConfig
    from trainkit.learning.network import build_network

    x = torch.randint(0, 256, (batch, size, size, 3), dtype=torch.uint8)
    y = torch.randint(0, 6, (batch,))
    variants = {}
    for name in ("eager", "channels_last", "compile"):
        torch.manual_seed(0)
        net = build_network(TrainConfig(backbone="mobilenet_v3_small"), 6).train()
        if name == "channels_last":
            net = net.to(memory_format=torch.channels_last)
        fwd = torch.compile(net) if name == "compile" else net
        opt = torch.optim.AdamW(net.parameters(), lr=1e-3)

        def step(fwd=fwd, opt=opt):
            loss = torch.nn.functional.cross_entropy(fwd(x), y)
            opt.zero_grad()
            loss.backward()
            opt.step()

        for _ in range(3):  # warm-up; compile traces forward and backward here
            step()
        variants[name] = step
    bf16 = bool(torch.ops.mkldnn._is_mkldnn_bf16_supported())
    if bf16:
        base = variants["eager"]

        def bf16_step():
            with torch.autocast("cpu", dtype=torch.bfloat16):
                base()

        variants["bf16"] = bf16_step
    med = alternate(variants, rounds=rounds)
    ips = {k: round(batch / v, 1) for k, v in med.items()}
    return {
        "what": f"mobilenet_v3_small training step, batch {batch}, {size} px, median of {rounds}",
        "images_per_second": ips,
        "ratio_to_eager": {k: round(med["eager"] / v, 2) for k, v in med.items()},
        "native_bf16": bf16,
    }


def bench_familiarity(n: int = 256, size: int = 128) -> dict:
    """The cost of the familiarity output: the demo network exported with and without it."""
    import onnx
    import onnxruntime as ort

    from trainkit.export.familiarity_graph import fit_graph
    from trainkit.export.onnx_file import network_to_onnx
    from trainkit.learning.config import load_train_config
    from trainkit.learning.network import build_network
    from trainkit.learning.steps import head_module_name, stage_module_names

    torch.manual_seed(0)
    cfg = load_train_config("demo")
    network = build_network(cfg, 6, load_weights=False).eval()
    rng = np.random.default_rng(0)
    images = rng.integers(0, 256, (n, size, size, 3), dtype=np.uint8)
    graph, fam = fit_graph(
        network, head_module_name(cfg.backbone), images[:192], rng.integers(0, 6, 192),
        images[192:], val_photos=np.repeat(np.arange(8), 8)[: n - 192],
        stages=stage_module_names(cfg.backbone),
    )  # fmt: skip
    with tempfile.TemporaryDirectory() as d:
        sess = {}
        for name, net in (("plain", network), ("with_familiarity", graph)):
            path = Path(d) / f"{name}.onnx"
            onnx.save(network_to_onnx(net, size), str(path))
            sess[name] = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])

        def run(name):
            return lambda: [
                sess[name].run(None, {"image": images[i : i + 64]}) for i in range(0, n, 64)
            ]

        med = alternate({k: run(k) for k in sess}, rounds=7)
    return {
        "what": f"{cfg.backbone} (demo recipe) in ONNX Runtime, {n} patches of {size} px, "
        f"batch 64; familiarity over {len(fam['layers'])} layers",
        "patches_per_second": {k: round(n / v, 1) for k, v in med.items()},
        "ratio_with_to_without": round(med["plain"] / med["with_familiarity"], 3),
    }


BENCHMARKS = {
    "memory_format": bench_memory_format,
    "inference": bench_onnx_vs_torch,
    "tiling": bench_tiling,
    "scan": bench_scan,
    "training": bench_training,
    "train_step": bench_train_step,
    "familiarity": bench_familiarity,
}
#: Keyword arguments that `--quick` passes to the benchmarks that have a smoke-test size.
QUICK = {"training": {"size": "quick"}}


def main(argv: list[str]) -> int:
    quick = "--quick" in argv
    names = [a for a in argv if a != "--quick"] or list(BENCHMARKS)
    unknown = [n for n in names if n not in BENCHMARKS]
    if unknown:
        print(
            f"unknown benchmark(s) {unknown}; choose from: {', '.join(BENCHMARKS)}", file=sys.stderr
        )
        return 2
    results: dict = {"torch_threads": torch.get_num_threads()}
    for n in names:
        results[n] = BENCHMARKS[n](**(QUICK.get(n, {}) if quick else {}))
    print(json.dumps(results, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
