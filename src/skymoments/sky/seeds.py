"""Independent, stable random streams per purpose, from one base seed.

One base ``seed`` (the config's ``seed``) feeds every random choice of a run. Each purpose
("train", "val", "synthesis", "init", "training_image", ...) gets its own stream,
``numpy.random.SeedSequence(seed, spawn_key=(stable_int(purpose), *indices))``: the child
is keyed by a hash of the purpose's *name*, not by the order in which purposes are asked
for, so the "val" stream is the same whether or not "train" was requested first, and
adding a new purpose later never shifts an old one. Extra integer indices (a DDP rank, a
DataLoader worker) give further independent children of that purpose.

``SeedSequence`` mixes the spawn key into the entropy pool with a hash designed so that
distinct keys give statistically independent streams (numpy documentation,
"Parallel random number generation").
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable

import numpy as np

__all__ = ["as_generator", "seed_sequence", "stable_int", "stream", "streams", "torch_seed"]


def stable_int(name: str) -> int:
    """A 64-bit non-negative integer from a purpose name, the same in every process.

    Python's ``hash`` is salted per process (PYTHONHASHSEED), so it cannot key streams;
    the first 8 bytes of SHA-256 of the UTF-8 name can.
    """
    if not isinstance(name, str) or not name:
        raise ValueError(f"a stream purpose must be a non-empty string, got {name!r}")
    return int.from_bytes(hashlib.sha256(name.encode("utf-8")).digest()[:8], "little")


def _check_seed(seed) -> int:
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed!r}")
    return int(seed)


def _check_indices(indices: Iterable) -> tuple[int, ...]:
    out = []
    for i in indices:
        if isinstance(i, bool) or not isinstance(i, int | np.integer) or i < 0:
            raise ValueError(
                f"stream indices (rank, worker) must be non-negative integers, got {i!r}"
            )
        out.append(int(i))
    return tuple(out)


def seed_sequence(seed: int, purpose: str, *indices: int) -> np.random.SeedSequence:
    """The SeedSequence of one purpose (and optional rank/worker indices).

    Parameters
    ----------
    seed : int
        Base seed, >= 0.
    purpose : str
        Name of the stream, e.g. ``"train"``.
    *indices : int
        Optional further keys, e.g. the DDP rank then the DataLoader worker id.
    """
    return np.random.SeedSequence(
        _check_seed(seed), spawn_key=(stable_int(purpose), *_check_indices(indices))
    )


def stream(seed: int, purpose: str, *indices: int) -> np.random.Generator:
    """A ``numpy.random.Generator`` (PCG64) for one purpose; see :func:`seed_sequence`."""
    return np.random.Generator(np.random.PCG64(seed_sequence(seed, purpose, *indices)))


def streams(
    seed: int, *purposes: str, rank: int | None = None, worker: int | None = None
) -> dict[str, np.random.Generator]:
    """Independent generators, one per purpose.

    Parameters
    ----------
    seed : int
        Base seed, >= 0.
    *purposes : str
        Stream names; each is derived from its name alone.
    rank, worker : int, optional
        DDP rank and DataLoader worker id; when given they key further independent
        children, so every rank and worker draws different maps.

    Returns
    -------
    dict
        ``{purpose: Generator}``.

    Examples
    --------
    >>> rngs = streams(0, "train", "val")
    >>> float(rngs["val"].random()) == float(streams(0, "val")["val"].random())
    True
    """
    if not purposes:
        raise ValueError("streams() needs at least one purpose name, e.g. streams(seed, 'train')")
    extra = tuple(i for i in (rank, worker) if i is not None)
    if rank is None and worker is not None:
        # Keep (worker,) distinct from (rank,) for the same number: rank defaults to 0.
        extra = (0, worker)
    return {p: stream(seed, p, *extra) for p in purposes}


def torch_seed(seed: int, purpose: str, *indices: int) -> int:
    """A 63-bit integer seed for ``torch.manual_seed`` and friends, from the same tree."""
    state = seed_sequence(seed, purpose, *indices).generate_state(1, np.uint64)
    return int(state[0] >> np.uint64(1))


def as_generator(rng) -> np.random.Generator:
    """A Generator from an int seed (``numpy.random.default_rng``) or an existing Generator."""
    if isinstance(rng, np.random.Generator):
        return rng
    if isinstance(rng, bool) or not isinstance(rng, int | np.integer) or rng < 0:
        raise ValueError(
            f"rng must be a numpy Generator or a non-negative integer seed, got {rng!r}"
        )
    return np.random.default_rng(int(rng))
