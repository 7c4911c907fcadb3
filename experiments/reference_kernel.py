"""A fixed FFT + convolution workload, to quote a machine's speed beside any figure.

The project's wall times (the quickstart, the exact-posterior check, synthesis) are spent in
FFTs (WPH synthesis, the sky model) and small convolutions (the networks). This script runs
one fixed mix of both on one thread and prints its speed, so a figure measured on one
machine can be scaled to another: a machine whose reference-kernel time is twice as long
will take about twice as long on the benchmarks (roughly: memory, threads and load matter
too).

Workload per repetition (float32, 1 torch thread):

* FFT: ``fft2`` then ``ifft2`` of 64 x 2 x 5 x 4 complex 64x64 maps (one WPH evaluation's
  wavelet stack for a batch of 64 two-channel maps);
* conv: forward + backward of a 3x3 convolution, 16 -> 16 channels, batch 32 of 64x64 maps
  with circular padding (one layer of the quickstart's U-Net at full resolution).

    python experiments/reference_kernel.py [--reps 10]

Prints the median seconds per repetition of each part and of the sum (the reference-kernel
time quoted in the READMEs), with the load average (the machine is shared: quote it).
"""

from __future__ import annotations

import argparse
import os
import platform
import time

import numpy as np
import torch


def fft_part():
    g = torch.Generator().manual_seed(0)
    x = torch.complex(
        torch.randn(64, 2, 5, 4, 64, 64, generator=g), torch.randn(64, 2, 5, 4, 64, 64, generator=g)
    )

    def run():
        torch.fft.ifft2(torch.fft.fft2(x))

    return run


def conv_part():
    g = torch.Generator().manual_seed(1)
    conv = torch.nn.Conv2d(16, 16, 3, padding=1, padding_mode="circular")
    x = torch.randn(32, 16, 64, 64, generator=g, requires_grad=True)

    def run():
        conv.zero_grad(set_to_none=True)
        x.grad = None
        conv(x).square().mean().backward()

    return run


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--reps", type=int, default=10)
    args = ap.parse_args()
    torch.set_num_threads(1)
    parts = {"fft": fft_part(), "conv": conv_part()}
    for f in parts.values():
        f()  # warm-up
    times = {k: [] for k in parts}
    for _ in range(args.reps):
        for k, f in parts.items():
            t0 = time.perf_counter()
            f()
            times[k].append(time.perf_counter() - t0)
    med = {k: float(np.median(v)) for k, v in times.items()}
    print(
        f"machine: {platform.machine()} {platform.processor() or ''} {os.cpu_count()} cores; "
        f"torch {torch.__version__}; load average {os.getloadavg()[0]:.2f}"
    )
    print(
        f"reference kernel (1 thread, median of {args.reps}): fft {med['fft']:.3f} s, "
        f"conv {med['conv']:.3f} s, total {med['fft'] + med['conv']:.3f} s"
    )


if __name__ == "__main__":
    main()
