"""Cost of predicting on the sphere: the band-limited cut beside the exact reference cut.

    python experiments/sphere_predict/bench.py [--nside 1024] [--lmax 3000]
        [--centres 100 1000] [--exact-centres 4] [--threads N]

One run, on one healpy ``synfast`` Q/U sky (a smooth red spectrum), at the quickstart's
patch geometry (64 x 64 pixels of 3 arcmin) with a network of the quickstart's size (two
U-Nets, depth 3, width 16; random weights: the cost does not depend on their values):

1. the one-off transform of the map to E/B alms (``maps.sky_cuts.sky_harmonics``);
2. for each count of centres: the cut of every patch in one synthesis, the forward pass
   and the back-projection onto the map's HEALPix pixels (partial sky, inverse-variance
   overlaps), and the end-to-end total including the transform;
3. today's exact path (``maps.healpix.cut_patch``, alms rotated per centre) on a few
   centres, its cost per centre and the ratio to the band-limited cut;
4. the largest difference between the two cuts on those centres, relative to the rms;
5. the process's peak resident memory.
"""

from __future__ import annotations

import argparse
import resource
import time

import numpy as np
import torch

from skymoments.maps.geometry import FlatPatch
from skymoments.maps.healpix import cut_patch, synfast_tqu
from skymoments.maps.sky_cuts import cut_patches, sky_harmonics
from skymoments.moments.pipeline import predict_moments
from skymoments.nets import ChannelScaler, PosteriorMoments, UNet
from skymoments.predict.outputs import project_to_healpix


def _peak_gib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20  # kB on Linux


def _model(fit_qu: np.ndarray) -> PosteriorMoments:
    torch.manual_seed(0)
    nets = [UNet(2, 2, depth=3, width=16, norm="batch") for _ in range(2)]
    return PosteriorMoments(
        nets[0], nets[1], ChannelScaler(2).fit(fit_qu), ChannelScaler(2, center=False).fit(fit_qu)
    ).eval()


def _centres(n: int, seed: int) -> np.ndarray:
    """``n`` centres uniform on the sphere (area-uniform in sin(lat))."""
    rng = np.random.default_rng(seed)
    return np.stack([rng.uniform(0, 360, n), np.degrees(np.arcsin(rng.uniform(-1, 1, n)))], 1)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--nside", type=int, default=1024)
    ap.add_argument("--lmax", type=int, default=3000)
    ap.add_argument("--centres", type=int, nargs="+", default=[100, 1000])
    ap.add_argument("--exact-centres", type=int, default=4)
    ap.add_argument("--threads", type=int, default=0, help="torch threads; 0: torch's default")
    args = ap.parse_args()
    if args.threads:
        torch.set_num_threads(args.threads)
    patch = FlatPatch(64, 3.0)
    ell = np.arange(args.lmax + 1)
    ee = np.where(ell > 1, 50.0 / (ell + 10.0) ** 2, 0.0)
    t = time.perf_counter()
    tqu = synfast_tqu(
        {"TT": 4 * ee, "EE": ee, "BB": 0.3 * ee, "TE": 0 * ee}, args.nside, args.lmax, seed=1
    )
    qu = np.ascontiguousarray(tqu[1:])
    del tqu
    print(f"sky: NSIDE {args.nside}, lmax {args.lmax} (synfast {time.perf_counter() - t:.1f} s)")
    print(f"patch: {patch.npix}x{patch.npix} x {patch.pixel_arcmin:g} arcmin; torch threads "
          f"{torch.get_num_threads()}")  # fmt: skip

    t = time.perf_counter()
    harm = sky_harmonics(qu, lmax=args.lmax)
    t_alm = time.perf_counter() - t
    print(f"one-off transform to E/B alms: {t_alm:.1f} s")
    model = _model(cut_patches(harm, _centres(16, 99), patch))

    print(f"{'centres':>8} {'cut s':>8} {'forward s':>10} {'back s':>8} {'total s':>8} "
          f"{'ms/centre':>10} {'peak GiB':>9}")  # fmt: skip
    for n in args.centres:
        cen = _centres(n, n)
        t0 = time.perf_counter()
        data = cut_patches(harm, cen, patch)
        t1 = time.perf_counter()
        mean, std = predict_moments(model, data, batch_size=64)
        t2 = time.perf_counter()
        project_to_healpix(mean, std, cen, patch, args.nside)
        t3 = time.perf_counter()
        per = (t3 - t0) / n * 1e3
        print(f"{n:>8} {t1 - t0:>8.1f} {t2 - t1:>10.1f} {t3 - t2:>8.1f} {t_alm + t3 - t0:>8.1f} "
              f"{per:>10.0f} {_peak_gib():>9.2f}")  # fmt: skip

    if args.exact_centres > 0:
        cen = _centres(args.exact_centres, 7)
        t = time.perf_counter()
        fast = cut_patches(harm, cen, patch)
        t_fast = time.perf_counter() - t
        exact = []
        t = time.perf_counter()
        for lon, lat in cen:
            exact.append(cut_patch(qu, lon, lat, patch, lmax=args.lmax))
            print(f"  exact cut at ({lon:.1f}, {lat:.1f}): {time.perf_counter() - t:.0f} s so far",
                  flush=True)  # fmt: skip
        t_exact = time.perf_counter() - t
        exact = np.stack(exact)
        diff = np.abs(fast - exact).max() / exact.std()
        per_exact = t_exact / len(cen)
        per_fast = (t_alm + t_fast) / len(cen)
        print(f"exact path on {len(cen)} centres: {t_exact:.0f} s, {per_exact:.0f} s per centre")
        print(f"band-limited cut of the same centres: {t_fast:.2f} s (+ {t_alm:.1f} s transform)")
        ratio = per_exact / per_fast
        print(f"ratio exact / band-limited per centre, transform included: {ratio:.0f}")
        print(f"max |band-limited - exact| / rms over those patches: {diff:.1e}")
    print(f"peak resident memory: {_peak_gib():.2f} GiB")


if __name__ == "__main__":
    main()
