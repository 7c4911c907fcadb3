"""Image-bank draws: periodic translations, windows of larger images, disjoint stage parts.

References: numpy.roll (a periodic translation); the stationarity of a periodic field (the
power spectrum of a translated map equals the original's, numpy.fft); set disjointness.
"""

from __future__ import annotations

import numpy as np
import pytest

from skymoments.maps.geometry import FlatPatch
from skymoments.sky.foregrounds import ImageBank


def _images(m=3, n=16, seed=0):
    return np.random.default_rng(seed).standard_normal((m, 2, n, n))


def test_periodic_translation_is_a_roll_of_the_image():
    img = _images(1)
    bank = ImageBank(img, symmetries=False, translations=True)
    patch = FlatPatch(16, 3.0)
    out = bank.draw(patch, np.random.default_rng(5), 20)
    rolls = {
        (dy, dx): np.roll(img[0], (-dy, -dx), axis=(-2, -1)) for dy in range(16) for dx in range(16)
    }
    for m in out:
        assert any(np.array_equal(m, r) for r in rolls.values())
    # Translations move the image: not all draws are the image itself.
    assert sum(np.array_equal(m, img[0]) for m in out) < 5
    # A translation keeps |FFT|^2 (numpy.fft), as a symmetry of a stationary field must.
    np.testing.assert_allclose(
        np.abs(np.fft.fft2(out[0])) ** 2, np.abs(np.fft.fft2(img[0])) ** 2, rtol=1e-9, atol=1e-9
    )


def test_windows_of_a_larger_image():
    big = _images(1, n=32)
    patch = FlatPatch(16, 3.0)
    rng = np.random.default_rng(2)
    # Non-periodic: every window lies inside the image (no wrap across its seam).
    inside = ImageBank(big, symmetries=False, translations=True, periodic=False)
    windows = {(y, x): big[0][:, y : y + 16, x : x + 16] for y in range(17) for x in range(17)}
    for m in inside.draw(patch, rng, 12):
        assert any(np.array_equal(m, w) for w in windows.values())
    # Periodic: windows may wrap, like np.roll then a corner cut.
    wrap = ImageBank(big, symmetries=False, translations=True, periodic=True)
    for m in wrap.draw(patch, rng, 6):
        assert any(
            np.array_equal(m, np.roll(big[0], (-y, -x), axis=(-2, -1))[:, :16, :16])
            for y in range(32)
            for x in range(32)
        )
    with pytest.raises(ValueError, match="enable translations"):
        ImageBank(big).draw(patch, rng, 1)


def test_split_gives_disjoint_parts_and_a_clear_error_when_too_small():
    imgs = _images(5)
    bank = ImageBank(imgs, translations=True)
    mean_part, var_part = bank.split(2)
    assert (len(mean_part), len(var_part)) == (3, 2)
    assert mean_part.translations and var_part.symmetries
    flat = lambda b: {a.tobytes() for a in b.images}  # noqa: E731
    assert not flat(mean_part) & flat(var_part)
    assert flat(mean_part) | flat(var_part) == flat(bank)
    with pytest.raises(ValueError, match="needs at least 6 images"):
        bank.split(5)
    with pytest.raises(ValueError, match="needs at least 2 images"):
        ImageBank(imgs[:1]).split(1)


def test_quickstart_split_refuses_a_small_bank_before_any_synthesis():
    from hydra import compose, initialize_config_dir

    from skymoments.config import conf_dir
    from skymoments.study.training import check_split

    with initialize_config_dir(config_dir=str(conf_dir()), version_base="1.3"):
        cfg = compose("config", overrides=["experiment=quickstart", "synthesis.n_images=2"])
        ok = compose("config", overrides=["experiment=quickstart"])
    with pytest.raises(ValueError, match=r"augment\.var_images=4 needs a bank of at least 5"):
        check_split(cfg)
    check_split(ok)  # the quickstart's own bank splits
