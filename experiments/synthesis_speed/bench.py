"""Synthesis against its own floor, measured side by side in one run:

1. the WPH loss evaluation (forward + backward, chunks of 2 maps, as the synthesis runs it)
   over the FFT-only cost of the same transforms (the FFTs the evaluation needs, run
   forward and again for the backward), for earlier implementations (``--before``, git
   revisions of ``synthesis/wph.py``: the first one, ed15cfe, and the autograd one before
   the hand-written backward of ``synthesis/stack_moments.py``, 6c61e48) and the current
   one, interleaved. The process keeps freed memory (``skymoments.heap``, as every
   ``skymoments`` command does); ``SKYMOMENTS_KEEP_HEAP=0`` measures without;
2. L-BFGS iterations to a quality: a Gaussian start (the former default) and the
   coarse-to-fine start, each counted until its loss reaches the Gaussian start's loss at
   ``--iters`` iterations (a coarse iteration weighted by the cost of a 32x32 evaluation
   over a 64x64 one, measured side by side), with the quality metrics of both against the
   training image;
3. a bank of ``--bank`` syntheses of 64x64 two-channel maps with the configured defaults
   (``conf/synthesis/default.yaml``): seconds per map.

    python experiments/synthesis_speed/bench.py [--threads 1] [--iters 200] [--bank 64]
        [--parts 1 2 3] [--before REV ...]
"""

from __future__ import annotations

import argparse
import importlib.util
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import torch

from skymoments.heap import keep_freed_memory
from skymoments.maps.geometry import FlatPatch
from skymoments.sky.foregrounds import make_foreground
from skymoments.synthesis import wph as current
from skymoments.synthesis.quality import quality_metrics
from skymoments.synthesis.synthesize import SynthesisSettings, fourier_resample, synthesize

ROOT = Path(__file__).resolve().parents[2]


def load_before(rev: str):
    """``synthesis/wph.py`` at git revision ``rev`` as a module, or None without git."""
    try:
        src = subprocess.run(
            ["git", "show", f"{rev}:src/skymoments/synthesis/wph.py"],
            cwd=ROOT,
            capture_output=True,
            text=True,
            check=True,
        ).stdout
    except (OSError, subprocess.CalledProcessError):
        return None
    name = f"wph_{rev}"
    path = Path(tempfile.mkdtemp()) / f"{name}.py"
    path.write_text(src)
    spec = importlib.util.spec_from_file_location(name, path)
    mod = importlib.util.module_from_spec(spec)
    sys.modules[name] = mod
    spec.loader.exec_module(mod)
    return mod


def evaluation(mod, t: np.ndarray, settings: SynthesisSettings, start: np.ndarray):
    """A function running one loss evaluation (forward + backward) of module ``mod``."""
    cfg = mod.WPHConfig(
        n_scales=settings.n_scales,
        n_orientations=settings.n_orientations,
        scale_reach=settings.scale_reach,
        orientation_reach=settings.orientation_reach,
        shift_reach=settings.shift_reach,
    )
    stats = mod.WPHStatistics(t.shape[1:], cfg, t.shape[0], t)
    goal = stats.moments(t).detach()[0]
    x = torch.tensor(start, dtype=torch.float32, requires_grad=True)

    def run():
        x.grad = None
        mod.loss_per_image(stats.moments(x), goal).sum().backward()

    return run


def fft_floor(shape: tuple[int, ...], settings: SynthesisSettings):
    """The FFTs of one evaluation of ``shape`` (b, C, n, n) maps, forward and backward:
    fft2 of the maps, ifft2 of the wavelet stack, fft2 of the envelopes, ifft2 of the
    low-passed maps; each again for the backward pass."""
    b, c, n, _ = shape
    maps = torch.randn(b, c, n, n)
    stack = torch.randn(b, c, settings.n_scales, settings.n_orientations, n, n)
    stack_c = torch.complex(stack, stack)
    maps_c = torch.complex(maps, maps)

    def run():
        for _ in range(2):
            torch.fft.fft2(maps)
            torch.fft.ifft2(stack_c)
            torch.fft.fft2(stack)
            torch.fft.ifft2(maps_c)

    return run


def interleaved(fns: dict, reps: int) -> dict:
    """Median seconds per call of each function, called in turn ``reps`` times."""
    for f in fns.values():
        f()
    times = {k: [] for k in fns}
    for _ in range(reps):
        for k, f in fns.items():
            t0 = time.perf_counter()
            f()
            times[k].append(time.perf_counter() - t0)
    return {k: float(np.median(v)) for k, v in times.items()}


def iterations_to(history: list[float], level: float, every: int = 10) -> int | None:
    """First checked iteration count whose loss is at most ``level`` (None if never)."""
    for i, v in enumerate(history):
        if v <= level:
            return (i + 1) * every
    return None


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--iters", type=int, default=200)
    ap.add_argument("--bank", type=int, default=64, help="maps in the timed bank (0: skip)")
    ap.add_argument(
        "--before", nargs="*", default=["ed15cfe", "6c61e48"], help="git revisions of wph.py"
    )
    ap.add_argument("--reps", type=int, default=15)
    ap.add_argument("--seed", type=int, default=2024)
    ap.add_argument("--parts", nargs="+", type=int, default=[1, 2, 3], help="which of 1 2 3")
    args = ap.parse_args()
    torch.set_num_threads(args.threads)
    heap = keep_freed_memory()
    patch = FlatPatch(64, 3.0)
    fg = make_foreground("filaments")
    target = fg.draw(patch, np.random.default_rng(args.seed), 1)[0]
    defaults = SynthesisSettings()
    print(
        f"load average at start: {os.getloadavg()[0]:.2f} (2-core machine); "
        f"threads {args.threads}; torch {torch.__version__}; freed memory kept: {heap}"
    )

    t = target / target.std()
    if 1 in args.parts or 2 in args.parts:
        compare_speed(args, target, t, defaults, patch)
    if 3 in args.parts and args.bank:
        bank(args, target)
    print(f"load average at end: {os.getloadavg()[0]:.2f}")


def compare_speed(args, target, t, defaults, patch) -> None:
    """Parts 1 and 2 of the module docstring."""
    # 1. Evaluation over the FFT floor, before and after, interleaved.
    start = np.repeat(t[None], 2, 0) + 0.3 * np.random.default_rng(0).standard_normal((2, *t.shape))
    fns = {"fft": fft_floor(start.shape, defaults)}
    for rev in args.before:
        before = load_before(rev)
        if before is not None:
            fns[rev] = evaluation(before, t, defaults, start)
        else:
            print(f"(no git revision {rev}: its evaluation is skipped)")
    fns["now"] = evaluation(current, t, defaults, start)
    med = interleaved(fns, args.reps)
    print(f"evaluation of 2 maps (forward + backward): FFT floor {1e3 * med['fft']:.2f} ms")
    for k in fns:
        if k != "fft":
            print(
                f"  {k}: {1e3 * med[k]:.1f} ms = {med[k] / med['fft']:.1f}x floor"
                + ("" if k == "now" else f"; now {med[k] / med['now']:.2f}x faster")
            )

    # Cost of a half-resolution evaluation (the coarse stage's WPHConfig) relative to a
    # full one, measured side by side: it weighs the coarse iterations below.
    half = fourier_resample(t, t.shape[-1] // 2)
    coarse_cfg = SynthesisSettings(
        n_scales=defaults.n_scales - 1, scale_reach=min(defaults.scale_reach, defaults.n_scales - 2)
    )
    med2 = interleaved(
        {
            "full": evaluation(current, t, defaults, start),
            "half": evaluation(current, half, coarse_cfg, fourier_resample(start, half.shape[-1])),
        },
        args.reps,
    )
    weight = med2["half"] / med2["full"]
    print(f"half-resolution evaluation / full-resolution evaluation: {weight:.2f}")

    # 2. Iterations to a quality: Gaussian start vs coarse-to-fine, tol = 0.
    runs = {}
    for name in ("gaussian", "coarse"):
        s = SynthesisSettings(n_images=1, batch=1, max_iter=args.iters, tol=0.0, start=name)
        t0 = time.perf_counter()
        runs[name] = (synthesize(target, s, seed=1), time.perf_counter() - t0)
    level = runs["gaussian"][0].history[-1]
    print(f"iterations to the Gaussian start's loss after {args.iters} iterations ({level:.3f}):")
    cost = {}
    for name, (res, sec) in runs.items():
        it = iterations_to(res.history, level)
        coarse = sum(res.coarse_iterations)
        cost[name] = None if it is None else it + coarse * weight
        m = quality_metrics(res.images, target, patch)
        print(
            f"  {name}: {it} full-resolution + {coarse} coarse iterations "
            f"(cost {'-' if cost[name] is None else f'{cost[name]:.1f}'} full-iteration "
            f"equivalents), final loss {res.history[-1]:.3f},"
            f" {sec:.1f} s; " + ", ".join(f"{k.split('/')[1]}={v:.3f}" for k, v in m.items())
        )
    if cost["coarse"]:
        print(f"  iterations ratio coarse/gaussian: {cost['coarse'] / cost['gaussian']:.2f}")


def bank(args, target) -> None:
    """Part 3: a bank with the defaults."""
    if args.bank:
        s = SynthesisSettings(n_images=args.bank)
        t0 = time.perf_counter()
        seen = set()

        def progress(d):
            if d["batch"] > 0 and d["batch"] not in seen:  # a batch has finished
                seen.add(d["batch"])
                done = d["batch"] * s.batch
                sec = time.perf_counter() - t0
                print(f"  {done} maps in {sec:.0f} s ({sec / done:.1f} s per map)", flush=True)

        res = synthesize(target, s, seed=3, progress=progress)
        sec = time.perf_counter() - t0
        print(
            f"bank of {args.bank} 64x64 Q/U maps (defaults, start={s.start}): {sec:.0f} s, "
            f"{sec / args.bank:.2f} s per map, iterations per batch {res.iterations}, "
            f"mean final loss {np.mean(res.loss):.3f}"
        )


if __name__ == "__main__":
    main()
