"""Atomic file writes: a reader sees the old file or the whole new one, never half of one."""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path

import numpy as np


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike, overwrite: bool = True) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success move it onto ``path``.

    The temporary file lives in the same folder, so ``os.replace`` is atomic. On any
    exception it is removed and ``path`` is left as it was.

    Parameters
    ----------
    path : path-like
        Final destination.
    overwrite : bool
        When False, refuse (FileExistsError) if ``path`` already exists.
    """
    final = Path(path)
    if not overwrite and final.exists():
        raise FileExistsError(f"{final} exists; pass --force (or overwrite=true) to replace it")
    final.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(
        prefix=f".{final.name}.", suffix=".part" + final.suffix, dir=final.parent
    )
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        os.replace(tmp_path, final)
    finally:
        if tmp_path.exists():
            tmp_path.unlink()


def save_npz(path: str | os.PathLike, overwrite: bool = True, **arrays: np.ndarray) -> Path:
    """``numpy.savez`` written atomically; returns the final path."""
    final = Path(path)
    with atomic_path(final, overwrite=overwrite) as tmp:
        with open(tmp, "wb") as fh:
            np.savez(fh, **arrays)
    return final


def write_text(path: str | os.PathLike, text: str, overwrite: bool = True) -> Path:
    """Write ``text`` (UTF-8) to ``path`` atomically; returns the final path."""
    final = Path(path)
    with atomic_path(final, overwrite=overwrite) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return final


def write_json(path: str | os.PathLike, data, overwrite: bool = True, **dump_kw) -> Path:
    """``json.dump`` of ``data`` written atomically (``dump_kw`` as for ``json.dumps``)."""
    import json

    return write_text(path, json.dumps(data, **dump_kw), overwrite=overwrite)
