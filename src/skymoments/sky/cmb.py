"""CMB polarization spectra from CAMB, computed once per cosmology and cached on disk.

One CAMB call gives everything a scenario needs: the lensed scalar EE and BB spectra and
the tensor EE and BB spectra at ``r = 1``. Because the tensor spectra are linear in the
tensor amplitude (linear perturbation theory), any ``(r, A_lens)`` is then

    C_ell^BB = A_lens * C_ell^BB,lensed + r * C_ell^BB,tensor(r=1)
    C_ell^EE =          C_ell^EE,lensed + r * C_ell^EE,tensor(r=1)

The tensor tilt is held fixed (``nt``, default 0) rather than tied to ``r`` by CAMB's
default inflation-consistency relation ``nt = -r/8``, which would make the r = 1 spectrum
a poor template for small r. The CAMB call is the one CAMB's Python documentation gives:
``camb.set_params(..., WantTensors=True)`` then ``get_cmb_power_spectra(pars,
CMB_unit='muK', raw_cl=True)`` with columns TT, EE, BB, TE.

Cache: ``<cache_dir>/cmb_<key>.npz`` where the key hashes the parameters, the camb version
and the file format. ``cache_dir`` is the argument, else ``$SKYMOMENTS_CACHE``, else
``~/.cache/skymoments``. Writes are atomic (temporary file, then ``os.replace``), and a
file is trusted only if it loads, carries the same key and holds finite arrays of the
right length; anything else is recomputed. Results are also memoized in the process.
"""

from __future__ import annotations

import functools
import hashlib
import json
import os
import threading
import warnings
from dataclasses import asdict, dataclass, field, fields
from importlib import metadata
from pathlib import Path

import numpy as np

from skymoments.atomic import save_npz

__all__ = ["CMBCosmology", "CMBSpectra", "cache_path", "cmb_spectra", "default_cache_dir"]

# Bump when the arrays stored in a cache file change meaning.
_CACHE_FORMAT = 1
_ARRAYS = ("ee_lensed", "bb_lensed", "ee_tensor", "bb_tensor", "tt_lensed", "te_lensed")

_MEMO: dict[str, CMBSpectra] = {}
_MEMO_LOCK = threading.Lock()


@dataclass(frozen=True)
class CMBCosmology:
    """Parameters of the CAMB call (flat LCDM plus tensors).

    Parameters
    ----------
    H0 : float
        Hubble constant, km/s/Mpc.
    ombh2, omch2 : float
        Physical baryon and cold dark matter densities.
    As : float
        Scalar amplitude at k = 0.05 / Mpc.
    ns : float
        Scalar spectral index.
    tau : float
        Optical depth to reionization.
    lmax : int
        Largest multipole returned.
    nt : float
        Tensor spectral index, held fixed (not ``-r/8``) so tensor spectra are linear in r.
    lmax_tensor : int
        Largest multipole of the tensor computation; above it the tensor spectra are zero.
        CAMB's own default (600) truncates tensor BB by ~7% already at ell = 500; at 1500
        tensor BB at r = 1 is below 0.5% of lensing BB.
    """

    H0: float = 67.5
    ombh2: float = 0.022
    omch2: float = 0.122
    As: float = 2.0e-9
    ns: float = 0.965
    tau: float = 0.06
    lmax: int = 5000
    nt: float = 0.0
    lmax_tensor: int = 1500

    def __post_init__(self) -> None:
        for name in ("H0", "ombh2", "omch2", "As", "tau"):
            value = getattr(self, name)
            if not np.isfinite(value) or value <= 0:
                raise ValueError(f"sky.cmb.{name} must be a positive number, got {value!r}")
        for name in ("ns", "nt"):
            if not np.isfinite(getattr(self, name)):
                raise ValueError(f"sky.cmb.{name} must be finite, got {getattr(self, name)!r}")
        for name in ("lmax", "lmax_tensor"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 10:
                raise ValueError(f"sky.cmb.{name} must be an integer >= 10, got {value!r}")

    @classmethod
    def from_mapping(cls, mapping) -> CMBCosmology:
        """Build from a dict-like config node; unknown keys raise ValueError naming them."""
        data = dict(mapping)
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(data) - known)
        if unknown:
            raise ValueError(
                f"unknown sky.cmb keys {unknown}; known keys: {', '.join(sorted(known))}"
            )
        if "lmax" in data:
            data["lmax"] = _as_int(data["lmax"], "lmax")
        if "lmax_tensor" in data:
            data["lmax_tensor"] = _as_int(data["lmax_tensor"], "lmax_tensor")
        return cls(
            **{k: (float(v) if k not in ("lmax", "lmax_tensor") else v) for k, v in data.items()}
        )


def _as_int(value, name: str) -> int:
    if isinstance(value, float) and value.is_integer():
        return int(value)
    if isinstance(value, int | np.integer) and not isinstance(value, bool):
        return int(value)
    raise ValueError(f"sky.cmb.{name} must be an integer, got {value!r}")


@dataclass(frozen=True, eq=False)
class CMBSpectra:
    """Raw CMB power spectra, uK^2, indexed by multipole from 0.

    Attributes
    ----------
    ell : ndarray, shape (lmax + 1,)
    ee_lensed, bb_lensed : ndarray, shape (lmax + 1,), uK^2
        Lensed scalar spectra (A_lens = 1).
    ee_tensor, bb_tensor : ndarray, shape (lmax + 1,), uK^2
        Tensor spectra at r = 1.
    tt_lensed, te_lensed : ndarray, shape (lmax + 1,), uK^2, optional
        Lensed scalar TT and TE, kept for plots and checks.
    cosmology : CMBCosmology or None
    camb_version : str
    """

    ell: np.ndarray
    ee_lensed: np.ndarray
    bb_lensed: np.ndarray
    ee_tensor: np.ndarray
    bb_tensor: np.ndarray
    tt_lensed: np.ndarray | None = None
    te_lensed: np.ndarray | None = None
    cosmology: CMBCosmology | None = None
    camb_version: str = field(default="")

    def __post_init__(self) -> None:
        n = len(self.ell)
        for name in ("ee_lensed", "bb_lensed", "ee_tensor", "bb_tensor"):
            arr = np.asarray(getattr(self, name), dtype=float)
            if arr.shape != (n,):
                raise ValueError(f"CMBSpectra.{name} has shape {arr.shape}, expected ({n},)")
            if not np.all(np.isfinite(arr)) or np.any(arr < 0):
                raise ValueError(f"CMBSpectra.{name} must be finite and non-negative")

    @property
    def lmax(self) -> int:
        return int(self.ell[-1])

    def ee(self, r: float = 0.0, a_lens: float = 1.0) -> np.ndarray:
        """EE spectrum, uK^2: lensed scalar plus ``r`` times the r = 1 tensor spectrum.

        Lensing converts E to B but leaves EE nearly unchanged, so ``a_lens`` does not
        scale EE (it is accepted for symmetry with :meth:`bb`).
        """
        _check_amp(r, "r")
        _check_amp(a_lens, "a_lens")
        return self.ee_lensed + r * self.ee_tensor

    def bb(self, r: float = 0.0, a_lens: float = 1.0) -> np.ndarray:
        """BB spectrum, uK^2: ``a_lens`` times lensing BB plus ``r`` times tensor BB."""
        _check_amp(r, "r")
        _check_amp(a_lens, "a_lens")
        return a_lens * self.bb_lensed + r * self.bb_tensor


def _check_amp(value, name: str) -> None:
    if not np.isfinite(value) or value < 0:
        raise ValueError(f"{name} must be a finite number >= 0, got {value!r}")


def default_cache_dir() -> Path:
    """``$SKYMOMENTS_CACHE`` if set, else ``~/.cache/skymoments``."""
    env = os.environ.get("SKYMOMENTS_CACHE")
    return Path(env).expanduser() if env else Path.home() / ".cache" / "skymoments"


@functools.cache
def _camb_version() -> str:
    try:
        return metadata.version("camb")
    except metadata.PackageNotFoundError:  # pragma: no cover - camb is a dependency
        import camb

        return str(camb.__version__)


def cache_key(cosmo: CMBCosmology) -> str:
    """SHA-256 of the parameters, the camb version and the cache format."""
    payload = {"params": asdict(cosmo), "camb": _camb_version(), "format": _CACHE_FORMAT}
    return hashlib.sha256(json.dumps(payload, sort_keys=True).encode()).hexdigest()


def cache_path(cosmo: CMBCosmology, cache_dir: str | os.PathLike | None = None) -> Path:
    """Where the spectra of ``cosmo`` are cached."""
    folder = Path(cache_dir).expanduser() if cache_dir is not None else default_cache_dir()
    return folder / f"cmb_{cache_key(cosmo)[:24]}.npz"


def _run_camb(cosmo: CMBCosmology) -> dict[str, np.ndarray]:
    import camb

    pars = camb.set_params(
        H0=cosmo.H0,
        ombh2=cosmo.ombh2,
        omch2=cosmo.omch2,
        As=cosmo.As,
        ns=cosmo.ns,
        tau=cosmo.tau,
        r=1.0,
        nt=cosmo.nt,
        WantTensors=True,
        lmax=cosmo.lmax,
    )
    pars.max_l_tensor = int(cosmo.lmax_tensor)
    # CAMB's default k range for tensors is twice its default max_l_tensor; keep the ratio.
    pars.max_eta_k_tensor = 2.0 * cosmo.lmax_tensor
    results = camb.get_results(pars)
    cls = results.get_cmb_power_spectra(
        pars, CMB_unit="muK", raw_cl=True, lmax=cosmo.lmax, spectra=("lensed_scalar", "tensor")
    )
    lens, tens = cls["lensed_scalar"], cls["tensor"]
    # Columns: TT, EE, BB, TE (CAMB's get_cmb_power_spectra with raw_cl=True).
    out = {
        "ee_lensed": lens[:, 1],
        "bb_lensed": lens[:, 2],
        "ee_tensor": tens[:, 1],
        "bb_tensor": tens[:, 2],
        "tt_lensed": lens[:, 0],
        "te_lensed": lens[:, 3],
    }
    return {k: np.ascontiguousarray(v, dtype=np.float64) for k, v in out.items()}


def _load_cached(path: Path, key: str, lmax: int) -> dict[str, np.ndarray] | None:
    """The arrays of a trusted cache file, or None (missing, unreadable, stale, corrupt)."""
    if not path.is_file():
        return None
    try:
        with np.load(path, allow_pickle=False) as data:
            if str(data["key"]) != key:
                return None
            arrays = {name: np.array(data[name], dtype=np.float64) for name in _ARRAYS}
    except Exception:  # noqa: BLE001 - any unreadable file is simply not trusted
        return None
    for arr in arrays.values():
        if arr.shape != (lmax + 1,) or not np.all(np.isfinite(arr)):
            return None
    return arrays


def _freeze(arrays: dict[str, np.ndarray], cosmo: CMBCosmology, version: str) -> CMBSpectra:
    for arr in arrays.values():
        arr.setflags(write=False)
    ell = np.arange(cosmo.lmax + 1, dtype=np.float64)
    ell.setflags(write=False)
    return CMBSpectra(ell=ell, cosmology=cosmo, camb_version=version, **arrays)


def cmb_spectra(
    cosmo: CMBCosmology | None = None,
    cache_dir: str | os.PathLike | None = None,
    use_cache: bool = True,
) -> CMBSpectra:
    """Lensed scalar and r = 1 tensor EE/BB spectra for ``cosmo``, cached.

    Parameters
    ----------
    cosmo : CMBCosmology, optional
        Default parameters when omitted.
    cache_dir : path-like, optional
        Cache folder; default :func:`default_cache_dir`.
    use_cache : bool
        False forces a fresh CAMB call (the result still refreshes the caches).

    Returns
    -------
    CMBSpectra
        Arrays are read-only: the same object is shared by every caller in the process.
    """
    cosmo = CMBCosmology() if cosmo is None else cosmo
    if not isinstance(cosmo, CMBCosmology):
        raise ValueError(f"cosmo must be a CMBCosmology, got {type(cosmo).__name__}")
    key = cache_key(cosmo)
    path = cache_path(cosmo, cache_dir)
    version = _camb_version()
    with _MEMO_LOCK:
        if use_cache:
            memo = _MEMO.get(key)
            if memo is not None:
                return memo
            arrays = _load_cached(path, key, cosmo.lmax)
            if arrays is not None:
                spectra = _freeze(arrays, cosmo, version)
                _MEMO[key] = spectra
                return spectra
        arrays = _run_camb(cosmo)
        try:
            save_npz(path, key=np.array(key), **arrays)
        except OSError as err:
            # A read-only cache folder costs a recomputation next time, nothing else.
            warnings.warn(f"could not write the CMB cache {path}: {err}", stacklevel=2)
        spectra = _freeze(arrays, cosmo, version)
        _MEMO[key] = spectra
        return spectra


def clear_memo() -> None:
    """Forget the in-process memo (the disk cache is kept)."""
    with _MEMO_LOCK:
        _MEMO.clear()
