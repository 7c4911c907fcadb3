"""The on-disk bank of synthesized foregrounds: build once, reuse while the inputs match.

A bank is two files in one folder, named by a key that hashes everything that
determines its content (the training image's content hash, the synthesis settings
including the number of images M, and the seed):

* ``bank-<key>.npz`` with the array ``images``, shape (M, C, n, n), in the training
  image's units (uK: DEVELOPERS.md, Conventions);
* ``bank-<key>.json`` beside it: the settings, seed, final loss per image, the source's
  content hash, the package version, timings, and the SHA-256 of the ``.npz`` file.

Both are written atomically (a temporary file in the same folder, then ``os.replace``),
the images first and the metadata last. A reader trusts a bank only when both files exist
and agree (key, shape, and the ``.npz``'s SHA-256 as recorded in the metadata), so a build
interrupted at any point leaves nothing that a later run would trust: the next run
rebuilds it.
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from pathlib import Path

import numpy as np

import skymoments
from skymoments.atomic import atomic_path, save_npz
from skymoments.synthesis.synthesize import (
    SynthesisSettings,
    check_image,
    renamed_settings,
    synthesize,
)
from skymoments.synthesis.wph import LEGACY_FAMILIES

# /2: settings and moment families under descriptive names (n_scales, scale_reach, ...,
# wave_power, ...); a /1 bank (the papers' letters J, delta_j, ..., S11, ...) still loads,
# its recorded names translated to the current ones.
FORMAT = "skymoments-synthesis-bank/2"
FORMAT_V1 = "skymoments-synthesis-bank/1"


def default_bank_dir() -> Path:
    """``$SKYMOMENTS_CACHE/banks``, else ``~/.cache/skymoments/banks``."""
    root = os.environ.get("SKYMOMENTS_CACHE")
    base = Path(root).expanduser() if root else Path.home() / ".cache" / "skymoments"
    return base / "banks"


def content_hash(array: np.ndarray) -> str:
    """SHA-256 of an array's bytes (C order), shape and dtype, as hex."""
    a = np.ascontiguousarray(array)
    h = hashlib.sha256()
    h.update(str(a.dtype.str).encode())
    h.update(str(tuple(a.shape)).encode())
    h.update(a.tobytes())
    return h.hexdigest()


def _file_sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def bank_key(image_hash: str, settings: SynthesisSettings, seed: int) -> str:
    """The key of a bank: SHA-256 of the image hash, the settings (with M) and the seed."""
    blob = json.dumps(
        {"image": image_hash, "settings": settings.as_dict(), "seed": int(seed)}, sort_keys=True
    )
    return hashlib.sha256(blob.encode()).hexdigest()[:24]


def bank_paths(out_dir, key: str) -> tuple[Path, Path]:
    """``(npz, json)`` paths of the bank with this key in ``out_dir``."""
    d = Path(out_dir)
    return d / f"bank-{key}.npz", d / f"bank-{key}.json"


def load_bank(path) -> tuple[np.ndarray, dict]:
    """Read a bank and check that its two files agree.

    Parameters
    ----------
    path : path-like
        The bank's ``.npz`` (or its ``.json``).

    Returns
    -------
    images : ndarray, shape (M, C, n, n)
    metadata : dict

    Raises
    ------
    ValueError
        A file is missing, or the metadata does not describe this ``.npz`` (an
        interrupted or tampered build): rebuild the bank.
    """
    p = Path(path)
    npz, meta_path = p.with_suffix(".npz"), p.with_suffix(".json")
    if not npz.exists() or not meta_path.exists():
        raise ValueError(
            f"incomplete synthesis bank at {npz.with_suffix('')}.*: both the .npz and its "
            ".json metadata must exist (an interrupted build?); rebuild it"
        )
    try:
        meta = json.loads(meta_path.read_text())
    except json.JSONDecodeError as err:
        raise ValueError(f"bank metadata {meta_path} is not valid JSON ({err}); rebuild") from err
    except UnicodeDecodeError as err:
        raise ValueError(f"bank metadata {meta_path} is not text ({err}); rebuild") from err
    if not isinstance(meta, dict):
        # Valid JSON that is not an object (a list, a number, null) describes no bank.
        raise ValueError(
            f"bank metadata {meta_path} holds a JSON {type(meta).__name__}, not an object; "
            "rebuild the bank"
        )
    fmt = meta.get("format")
    if fmt not in (FORMAT, FORMAT_V1):
        raise ValueError(
            f"bank metadata {meta_path} has format {fmt!r}; this version reads {FORMAT} and "
            f"{FORMAT_V1}: rebuild the bank with this version (or read it with the one that "
            "wrote it)"
        )
    if meta.get("images_sha256") != _file_sha256(npz):
        raise ValueError(
            f"bank metadata {meta_path} does not match {npz.name} (checksum); "
            "the bank is incomplete or was modified: rebuild it"
        )
    if fmt == FORMAT_V1:
        meta = _from_v1(meta)
    with np.load(npz) as f:
        if "images" not in f:
            raise ValueError(f"{npz} has no array 'images'; rebuild the bank")
        images = f["images"]
    if list(images.shape) != list(meta.get("shape", [])):
        raise ValueError(
            f"{npz} holds images of shape {images.shape}, metadata says {meta.get('shape')}"
        )
    return images, meta


def _from_v1(meta: dict) -> dict:
    """A /1 bank's metadata under the current names of settings and moment families."""
    out = dict(meta)
    if isinstance(meta.get("settings"), dict):
        out["settings"] = renamed_settings(meta["settings"])
    if isinstance(meta.get("n_moments"), dict):
        out["n_moments"] = {LEGACY_FAMILIES.get(k, k): v for k, v in meta["n_moments"].items()}
    out["format_read"] = FORMAT_V1
    return out


def ensure_bank(
    image,
    settings: SynthesisSettings,
    out_dir=None,
    seed: int = 0,
    progress=None,
    source: str | None = None,
    chunk: int = 2,
) -> tuple[Path, np.ndarray, dict]:
    """Return the bank for these inputs, synthesizing it only if no valid one exists.

    Parameters
    ----------
    image : ndarray, shape (C, n, n)
        The training image (C = 2 for Q/U), microkelvin.
    settings : SynthesisSettings
        Includes ``n_images`` (M).
    out_dir : path-like, optional
        Folder of banks; default :func:`default_bank_dir`.
    seed : int
        Seed of the synthesis's Gaussian starts.
    progress : callable, optional
        Passed to :func:`skymoments.synthesis.synthesize.synthesize`.
    source : str, optional
        A description of where the image came from (a path), kept in the metadata.
    chunk : int
        Images per moment evaluation (speed and memory only).

    Returns
    -------
    path : Path
        The bank's ``.npz``.
    images : ndarray, shape (M, C, n, n)
    metadata : dict
        With ``reused`` True when an existing bank was returned.
    """
    settings.validate()
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        raise ValueError(f"synthesis seed must be a non-negative integer, got {seed!r}")
    img = check_image(image, settings.n_scales, settings.n_orientations)
    image_hash = content_hash(np.asarray(image))
    key = bank_key(image_hash, settings, int(seed))
    out = Path(out_dir).expanduser() if out_dir is not None else default_bank_dir()
    npz, meta_path = bank_paths(out, key)
    if npz.exists() and meta_path.exists():
        try:
            images, meta = load_bank(npz)
            if meta.get("key") == key:
                meta["reused"] = True
                return npz, images, meta
        except ValueError:
            pass  # an untrusted bank: rebuild it below
    out.mkdir(parents=True, exist_ok=True)
    # A stale metadata file must not vouch for the new images while they are written.
    if meta_path.exists():
        meta_path.unlink()
    t0 = time.perf_counter()
    res = synthesize(img, settings, seed=int(seed), progress=progress, chunk=chunk)
    elapsed = time.perf_counter() - t0
    images = res.images.astype(np.float32 if np.asarray(image).dtype == np.float32 else np.float64)
    save_npz(npz, images=images)
    meta = {
        "format": FORMAT,
        "key": key,
        "shape": list(images.shape),
        "settings": settings.as_dict(),
        "seed": int(seed),
        "source": source,
        "source_sha256": image_hash,
        "source_shape": list(np.shape(image)),
        "source_dtype": str(np.asarray(image).dtype),
        "loss": [float(v) for v in res.loss],
        "loss_initial": [float(v) for v in res.loss_initial],
        "iterations": [int(v) for v in res.iterations],
        "n_moments": res.n_moments,
        "seconds": elapsed,
        "seconds_per_image": elapsed / settings.n_images,
        "version": skymoments.__version__,
        "created_unix": time.time(),
        "images_sha256": _file_sha256(npz),
    }
    with atomic_path(meta_path) as tmp:
        tmp.write_text(json.dumps(meta, indent=2, sort_keys=True))
    meta["reused"] = False
    return npz, images, meta
