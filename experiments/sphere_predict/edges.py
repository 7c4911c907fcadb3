"""Patches cut from the sphere are not periodic: is the posterior mean right up to the edge?

    python experiments/sphere_predict/edges.py --model RUN_ID --root STORE
        [--nside 1024] [--lmax 3000] [--r 0.01] [--edge 8] [--seed 3]
        [--centres "30,-60 120,40 250,-20 0,80"]

One CMB-only sky from healpy (``synalm`` of the lensed CAMB spectra of the model's own
training config at ``--r``, then ``alm2map`` to Q/U), written as a HEALPix FITS map and
given to ``skymoments predict`` at the centres, exactly as a user would run it. The
reference is healpy's own E of the same alms, a scalar field, evaluated at the patch
pixels (``maps.sky_cuts.patch_sky_positions``; the band-limited field by ducc0's
``synthesis_general``, no interpolation). Printed per centre and over all of them: the
correlation of the predicted E mean with that reference over the whole patch and over its
interior (the patch minus ``--edge`` pixels on each side), and the mean |B| of the
posterior mean in the outer two pixels and inside (the true B is small: lensing and r).

The networks of ``experiment=quickstart`` are trained on periodic maps with circular
padding; those of ``experiment=cutouts`` on cut-outs of larger fields with zero padding,
as prediction sees them. Run this on one of each to see what training on cut-outs buys.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import healpy as hp
import numpy as np
from omegaconf import OmegaConf

from skymoments.config import conf_dir
from skymoments.maps.geometry import FlatPatch
from skymoments.maps.sky_cuts import patch_sky_positions, sky_locations
from skymoments.predict import pipeline
from skymoments.sky.cmb import CMBCosmology, cmb_spectra
from skymoments.tracking import download_artifact


def _corr(a: np.ndarray, b: np.ndarray) -> float:
    """Pearson correlation of two arrays over all their elements (numpy's)."""
    return float(np.corrcoef(np.ravel(a), np.ravel(b))[0, 1])


def _scalar_at(alm: np.ndarray, lmax: int, centres, patch: FlatPatch) -> np.ndarray:
    """The spin-0 field of ``alm`` at every patch pixel, shape (k, n, n)."""
    import ducc0

    vec, _ = patch_sky_positions(centres, patch)
    out = ducc0.sht.synthesis_general(
        alm=np.ascontiguousarray(alm[None]),
        spin=0,
        lmax=lmax,
        loc=sky_locations(vec),
        epsilon=1e-7,
    )
    return out[0].reshape(vec.shape[:3])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--model", required=True, help="run id (or models:/ URI) of the model")
    ap.add_argument("--root", required=True, type=Path, help="the model's tracking store")
    ap.add_argument("--nside", type=int, default=1024)
    ap.add_argument("--lmax", type=int, default=3000)
    ap.add_argument("--r", type=float, default=0.01)
    ap.add_argument("--edge", type=int, default=8, help="pixels on each side outside the interior")
    ap.add_argument("--seed", type=int, default=3)
    ap.add_argument("--centres", default="30,-60 120,40 250,-20 0,80")
    args = ap.parse_args()
    centres = [[float(v) for v in c.split(",")] for c in args.centres.split()]

    tracking = {"kind": "local", "root": str(args.root.absolute()), "experiment": "predict"}
    run_id = args.model
    if args.model.startswith("models:/"):
        raise SystemExit("give the training run's id: its config names the CMB spectra")
    with tempfile.TemporaryDirectory() as tmp:
        train_cfg = OmegaConf.load(download_artifact(tracking, run_id, "config/resolved.yaml", tmp))
    patch = FlatPatch(int(train_cfg.patch.npix), float(train_cfg.patch.pixel_arcmin))
    spectra = cmb_spectra(CMBCosmology.from_mapping(train_cfg.sky.cmb))
    lmax = min(args.lmax, spectra.lmax)
    zero = np.zeros(lmax + 1)
    ee, bb = spectra.ee(args.r)[: lmax + 1], spectra.bb(args.r)[: lmax + 1]

    t = time.perf_counter()
    # healpy's synalm draws from numpy's global legacy generator and takes no Generator.
    rng_state = np.random.get_state()  # noqa: NPY002
    np.random.seed(args.seed)  # noqa: NPY002
    alm_t, alm_e, alm_b = hp.synalm([zero, ee, bb, zero], lmax=lmax, new=True)
    np.random.set_state(rng_state)  # noqa: NPY002
    tqu = hp.alm2map([alm_t, alm_e, alm_b], args.nside, lmax=lmax, pol=True)
    print(f"sky: CMB only, r = {args.r:g}, NSIDE {args.nside}, lmax {lmax} "
          f"({time.perf_counter() - t:.1f} s)")  # fmt: skip

    with tempfile.TemporaryDirectory() as tmp:
        sky = Path(tmp) / "sky.fits"
        hp.write_map(sky, tqu, coord="G", column_units="uK", dtype=np.float32, overwrite=True)
        del tqu
        node = OmegaConf.load(conf_dir() / "predict" / "default.yaml")
        node = OmegaConf.merge(
            node,
            {
                "model": run_id,
                "input": str(sky),
                "centres": centres,
                "out": str(Path(tmp) / "out"),
                "log_run": False,
            },
        )
        cfg = OmegaConf.create({"predict": node, "tracking": tracking})
        res = pipeline.run_prediction(cfg)
        mean = np.asarray(res.mean_eb)
    ref_e = _scalar_at(alm_e, lmax, centres, patch)
    ref_b = _scalar_at(alm_b, lmax, centres, patch)

    n, k = patch.npix, args.edge
    inner = (slice(None), slice(k, n - k), slice(k, n - k))
    ring = np.ones((n, n), bool)
    ring[2:-2, 2:-2] = False
    print(f"E mean against healpy's E (interior: the central {n - 2 * k}x{n - 2 * k} pixels)")
    print(f"{'centre':>14} | corr whole | corr interior | |B| outer 2 px | |B| inside")
    for i, c in enumerate(centres):
        e, b = mean[i, 0], mean[i, 1]
        print(
            f"{c[0]:6.1f},{c[1]:6.1f} | {_corr(e, ref_e[i]):10.4f} | "
            f"{_corr(e[inner[1:]], ref_e[i][inner[1:]]):13.4f} | "
            f"{np.abs(b[ring]).mean():14.4f} | {np.abs(b[~ring]).mean():10.4f}"
        )
    whole = _corr(mean[:, 0], ref_e)
    interior = _corr(mean[:, 0][inner], ref_e[inner])
    print(
        f"{'all':>14} | {whole:10.4f} | {interior:13.4f} | "
        f"{np.abs(mean[:, 1][:, ring]).mean():14.4f} | {np.abs(mean[:, 1][:, ~ring]).mean():10.4f}"
    )
    print(f"interior - whole = {interior - whole:.4f} (target <= 0.01); true B rms "
          f"{ref_b.std():.4f} uK")  # fmt: skip


if __name__ == "__main__":
    main()
