"""The out-of-range flag from the data alone: statistics, range, score, state dict.

References: order statistics of exchangeable draws (a new draw from the training
distribution exceeds the maximum of N training draws of one feature with probability
1 / (N + 1)); numpy quantiles and the periodic Gaussian kernel's Fourier transform for the
features; torch state_dict round trips.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch

from skymoments.nets import InputRange


def _maps(n, seed, amp=1.0):
    rng = np.random.default_rng(seed)
    return amp * rng.standard_normal((n, 2, 16, 16))


def test_features_are_log_quantiles_of_the_polarized_intensity():
    ir = InputRange(fwhm_pix=(0.0,), quantiles=(0.5, 0.99))
    x = _maps(3, 0)
    p = np.hypot(x[:, 0], x[:, 1]).reshape(3, -1)
    want = np.log(np.quantile(p, [0.5, 0.99], axis=1).T)  # numpy is the reference
    np.testing.assert_allclose(ir.features(x).numpy(), want, rtol=1e-12)
    assert ir.feature_names() == ["log_P_q0.5_fwhm0", "log_P_q0.99_fwhm0"]


def test_flag_fires_rarely_in_range_and_always_on_brighter_data():
    ir = InputRange().fit(_maps(200, 1))
    # Exchangeability: per feature P(new > max of 200) = 1/201; over 6 features at most
    # 6/201 = 3% of in-distribution maps (fewer, the features are correlated).
    inside = ir.flag(_maps(400, 2))
    assert inside.mean() < 0.06
    # Three times brighter data lie far above every training patch.
    assert ir.flag(_maps(20, 3, amp=3.0)).all()
    assert np.all(ir.score(_maps(20, 3, amp=3.0)) > 0)
    # Fainter data are not an extrapolation into brighter foregrounds: not flagged.
    assert not ir.flag(_maps(20, 4, amp=0.5)).any()


def test_margin_flags_only_patches_beyond_the_range_by_more_than_it():
    ir = InputRange().fit(_maps(200, 1))
    x = np.concatenate([_maps(40, 2), _maps(40, 3, amp=1.05), _maps(40, 4, amp=3.0)])
    score = ir.score(x)
    # The flag is score > margin, the score itself does not depend on the margin.
    for margin in (0.0, 0.2, 1.0):
        ir.set_margin(margin)
        np.testing.assert_array_equal(ir.flag(x), score > margin)
        np.testing.assert_array_equal(ir.score(x), score)
    # The margins chosen here split the three groups differently (the test means something):
    # some 5%-brighter patches are beyond the range, fewer beyond it by 0.2 spreads.
    assert (score[40:80] > 0).sum() > (score[40:80] > 0.2).sum()
    assert np.all(score[80:] > 1.0)
    with pytest.raises(ValueError, match="margin must be >= 0"):
        ir.set_margin(-0.1)


def test_range_travels_in_the_state_dict_and_refuses_bad_input():
    ir = InputRange(margin=0.3).fit(_maps(50, 5))
    fresh = InputRange()
    fresh.load_state_dict(ir.state_dict())
    x = _maps(7, 6, amp=1.5)
    np.testing.assert_array_equal(fresh.score(x), ir.score(x))
    assert float(fresh.margin) == 0.3
    np.testing.assert_array_equal(fresh.flag(x), ir.flag(x))
    with pytest.raises(ValueError, match="no input-range statistics"):
        InputRange().score(x)
    bad = x.copy()
    bad[0, 0, 0, 0] = np.nan
    with pytest.raises(ValueError, match="NaN"):
        ir.score(bad)
    with pytest.raises(ValueError, match=r"\(n, 2, ny, nx\)"):
        ir.score(torch.zeros(2, 16, 16))


def test_posterior_files_carry_the_flag_per_patch(tmp_path):
    # astropy.io.fits reads the table back; numpy the npz.
    from astropy.io import fits

    from skymoments.calibration.report import write_posterior
    from skymoments.maps.geometry import FlatPatch

    ir = InputRange().fit(_maps(50, 7))
    data = np.concatenate([_maps(2, 8), _maps(1, 9, amp=4.0)])
    flag, score = ir.flag(data), ir.score(data)
    assert flag.tolist()[-1] is True
    mean = np.zeros((3, 2, 16, 16))
    npz, fit = write_posterior(
        tmp_path / "post", mean, mean + 1.0, FlatPatch(16, 3.0), patch_flag=flag, patch_score=score
    )
    with np.load(npz) as z:
        np.testing.assert_array_equal(z["patch_flag"], flag)
        np.testing.assert_allclose(z["patch_score"], score)
    with fits.open(fit) as hdul:
        np.testing.assert_array_equal(hdul["OUTOFRANGE"].data["FLAG"], flag)


class _Draws:
    """A scenario stand-in: ``draw(rng, n)`` of white Q/U maps of amplitude ``amp``."""

    def __init__(self, amp):
        self.amp, self.calls = amp, []

    def draw(self, rng, n):
        from types import SimpleNamespace

        self.calls.append(n)
        return SimpleNamespace(data_qu=self.amp * rng.standard_normal((n, 2, 16, 16)))


def test_range_is_fitted_on_the_scaler_draw_and_more_training_draws():
    from types import SimpleNamespace

    from skymoments.moments.data import stream_generator
    from skymoments.moments.pipeline import fit_input_range

    scaler = SimpleNamespace(data_qu=_maps(8, 3))
    mean_sc, var_sc = _Draws(1.0), _Draws(2.0)
    ir = InputRange()
    fit_input_range(ir, scaler, (mean_sc, var_sc), 600, seed=5, chunk=256)
    # Chunks of 256 alternate between the two stages' scenarios: 256, 256, then 88.
    assert mean_sc.calls == [256, 88] and var_sc.calls == [256]
    # Reference: the per-feature min and max over the same maps, redrawn from the same
    # stream in the same order, and the scaler draw.
    rng = stream_generator(5, "range")
    maps = [scaler.data_qu, 1.0 * rng.standard_normal((256, 2, 16, 16))]
    maps += [
        2.0 * rng.standard_normal((256, 2, 16, 16)),
        1.0 * rng.standard_normal((88, 2, 16, 16)),
    ]
    want = InputRange().fit(np.concatenate(maps))
    assert torch.equal(ir.low, want.low) and torch.equal(ir.high, want.high)
    # None or 0 more draws: the scaler draw alone.
    alone = InputRange()
    fit_input_range(alone, scaler, (mean_sc, None), None, seed=5)
    assert torch.equal(alone.high, InputRange().fit(scaler.data_qu).high)
    with pytest.raises(ValueError, match="range_draws must be >= 0"):
        fit_input_range(InputRange(), scaler, (mean_sc,), -1, seed=5)
