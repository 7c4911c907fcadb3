"""Speed of WPH synthesis on this machine: one 64x64 Q/U synthesis, batched vs one at a
time (side by side in one run, printed as a ratio), and the share of time in FFTs.

    python experiments/synthesis_speed/bench.py [--batch 4] [--iters 200] [--threads 1]
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np
import torch

from skymoments.maps.geometry import FlatPatch
from skymoments.sky.foregrounds import make_foreground
from skymoments.synthesis.quality import gaussian_surrogate, quality_metrics
from skymoments.synthesis.synthesize import SynthesisSettings, synthesize
from skymoments.synthesis.wph import WPHStatistics, loss_per_image


def fft_share(target: np.ndarray, settings: SynthesisSettings, batch: int, reps: int = 5):
    """Fraction of self CPU time in FFT kernels over forward+backward evaluations."""
    from torch.profiler import ProfilerActivity, profile

    t = target / target.std()
    wph = WPHStatistics(t.shape[1:], settings.wph_config(), 2, t)
    goal = wph.moments(t).detach()[0]
    x = torch.tensor(np.repeat(t[None], batch, 0), dtype=torch.float32, requires_grad=True)
    with profile(activities=[ProfilerActivity.CPU]) as prof:
        for _ in range(reps):
            for c in range(0, batch, 2):
                loss_per_image(wph.moments(x[c : c + 2]), goal).sum().backward()
    events = prof.key_averages()
    total = sum(e.self_cpu_time_total for e in events)
    fft = sum(e.self_cpu_time_total for e in events if "fft" in e.key.lower())
    return fft / total, wph.count()


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--batch", type=int, default=4)
    ap.add_argument("--iters", type=int, default=200)
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--seed", type=int, default=2024)
    args = ap.parse_args()
    torch.set_num_threads(args.threads)
    patch = FlatPatch(64, 3.0)
    fg = make_foreground("filaments")
    rng = np.random.default_rng(args.seed)
    target = fg.draw(patch, rng, 1)[0]
    truth = fg.draw(patch, rng, 32)
    print(
        f"load average at start: {os.getloadavg()[0]:.2f} (2-core machine); threads {args.threads}"
    )

    # 1. One 64x64 two-channel synthesis with the default settings (tol stops early).
    one = SynthesisSettings(n_images=1, batch=1, max_iter=args.iters)
    res = synthesize(target, one, seed=1)
    gauss = gaussian_surrogate(target, 4, np.random.default_rng(9))
    print(
        f"single 64x64 synthesis: {res.seconds:.1f} s, {res.iterations[0]} iterations, "
        f"loss {res.loss_initial[0]:.1f} -> {res.loss[0]:.3f}"
    )
    for name, ref in (("training image", target), ("independent draws", truth)):
        m = quality_metrics(res.images, ref, patch, surrogate=gauss)
        print(f"  vs {name}: " + ", ".join(f"{k.split('/')[1]}={v:.3f}" for k, v in m.items()))

    # 2. Batched vs one at a time, the same number of iterations (tol = 0), side by side:
    #    sequential, batched, sequential, batched, so drifting machine load hits both.
    fixed = dict(max_iter=min(args.iters, 60), tol=0.0)
    seq_t, bat_t, seq_l, bat_l = [], [], [], []
    for _rep in range(2):
        t0 = time.perf_counter()
        losses = []
        for i in range(args.batch):
            r = synthesize(target, SynthesisSettings(n_images=1, batch=1, **fixed), seed=10 + i)
            losses.append(r.loss[0])
        seq_t.append((time.perf_counter() - t0) / args.batch)
        seq_l.append(np.mean(losses))
        t0 = time.perf_counter()
        r = synthesize(
            target, SynthesisSettings(n_images=args.batch, batch=args.batch, **fixed), seed=10
        )
        bat_t.append((time.perf_counter() - t0) / args.batch)
        bat_l.append(np.mean(r.loss))
    s, b = np.mean(seq_t), np.mean(bat_t)
    print(
        f"{fixed['max_iter']} iterations, per image: one at a time {s:.2f} s, "
        f"batched x{args.batch} {b:.2f} s; ratio batched/single = {b / s:.2f} "
        f"(final loss {np.mean(bat_l):.2f} vs {np.mean(seq_l):.2f})"
    )

    # 3. Share of time in FFTs (torch.profiler, forward + backward).
    share, counts = fft_share(target, one, args.batch)
    print(f"moments: {counts}")
    print(f"share of self CPU time in FFT kernels: {100 * share:.1f}%")


if __name__ == "__main__":
    main()
