"""The one reader of users' maps (maps/reader.py), seen through both commands that use it.

References: the FITS standard for world coordinates (Greisen & Calabretta 2002, A&A 395,
1061: along a pixel axis with a diagonal PC matrix, the coordinate is CRVAL + CDELT * (p -
CRPIX), so it decreases with the array index when CDELT < 0), and the HEALPix polarization
convention (IAU measures the angle from north towards east, COSMO from south towards east,
so they differ by the sign of U).
"""

from __future__ import annotations

import numpy as np
import pytest
from astropy.io import fits

from skymoments.maps.geometry import FlatPatch
from skymoments.maps.reader import read_image_file
from skymoments.maps.training_file import load_training_image
from skymoments.predict.inputs import read_input

# A 4x4 image in the file's own array order (FITS data[row, column]), values in K_CMB.
Q_FILE_UK = np.array(
    [[1.0, 2.0, 3.0, 4.0], [5.0, 6.0, 7.0, 8.0], [9.0, 10.0, 11.0, 12.0], [13.0, 14.0, 15.0, 16.0]]
)
U_FILE_UK = 10.0 * Q_FILE_UK + 100.0

# Written by hand from the references above:
# 1. BUNIT = K_CMB: 1 K = 1e6 uK (thermodynamic kelvin, the unit of CMB maps).
# 2. CDELT1 < 0: longitude decreases along the columns (east to the left), so reversing
#    the columns lays them out towards the east. In IAU, Q/U are referred to north and
#    east, not to the array, so only the pixels move.
# 3. IAU -> patch frame (angle from +x = east towards +y = north): psi_patch = 90 deg -
#    psi_IAU, and Q + iU ~ exp(2 i psi) gives exp(2i (90 - psi)) = -exp(-2 i psi), i.e.
#    (Q, U)_patch = (-Q, +U)_IAU.
WANT_Q = -np.array(
    [[4.0, 3.0, 2.0, 1.0], [8.0, 7.0, 6.0, 5.0], [12.0, 11.0, 10.0, 9.0], [16.0, 15.0, 14.0, 13.0]]
)
WANT_U = np.array(
    [
        [140.0, 130.0, 120.0, 110.0],
        [180.0, 170.0, 160.0, 150.0],
        [220.0, 210.0, 200.0, 190.0],
        [260.0, 250.0, 240.0, 230.0],
    ]
)
PIXEL_ARCMIN = 30.0


def _write_iau_kelvin_image(path):
    hdu = fits.PrimaryHDU(np.stack([Q_FILE_UK, U_FILE_UK]) * 1e-6)
    hdu.header["BUNIT"] = "K_CMB"
    hdu.header["CDELT1"] = -PIXEL_ARCMIN / 60.0
    hdu.header["CDELT2"] = PIXEL_ARCMIN / 60.0
    hdu.header["CUNIT1"] = "deg"
    hdu.header["CUNIT2"] = "deg"
    hdu.header["POLCCONV"] = "IAU"
    hdu.writeto(path)
    return path


def test_one_fits_image_reads_the_same_through_synthesize_and_predict(tmp_path):
    path = _write_iau_kelvin_image(tmp_path / "iau_kelvin.fits")
    want = np.stack([WANT_Q, WANT_U])
    patch = FlatPatch(4, PIXEL_ARCMIN)
    # Both commands' readers, on the same file. float64 data: K -> uK is one product, so
    # the values agree with the hand-written ones to round-off (a few ulp of 260).
    synth = load_training_image(path, patch=patch)
    pred = read_input(path)
    np.testing.assert_allclose(synth, want, rtol=1e-12, atol=0)
    np.testing.assert_allclose(pred.data_qu[0], want, rtol=1e-12, atol=0)
    np.testing.assert_array_equal(synth, pred.data_qu[0])
    assert pred.pixel_arcmin == pytest.approx(PIXEL_ARCMIN, rel=1e-12)
    assert pred.convention == "IAU"
    notes = read_image_file(path).notes
    assert "converted from K_CMB to uK" in notes and "columns mirrored (CDELT1 < 0)" in notes


def test_patch_frame_mirror_flips_u_in_both_readers(tmp_path):
    # Without POLCCONV the Q/U are in the array's own frame: a mirror of one axis maps the
    # angle psi to pi - psi, so U changes sign (a reflection of a spin-2 field).
    hdu = fits.PrimaryHDU(np.stack([Q_FILE_UK, U_FILE_UK]))
    hdu.header["CDELT1"] = -PIXEL_ARCMIN / 60.0
    hdu.header["CDELT2"] = PIXEL_ARCMIN / 60.0
    path = tmp_path / "patch_frame.fits"
    hdu.writeto(path)
    want = np.stack([Q_FILE_UK[:, ::-1], -U_FILE_UK[:, ::-1]])
    np.testing.assert_array_equal(load_training_image(path, patch=FlatPatch(4, 30.0)), want)
    np.testing.assert_array_equal(read_input(path).data_qu[0], want)


def test_training_image_geometry_must_match_the_patch(tmp_path):
    path = _write_iau_kelvin_image(tmp_path / "iau_kelvin.fits")
    with pytest.raises(ValueError, match=r"4x4 pixels but the patch is 8x8 .*patch\.npix=4"):
        load_training_image(path, patch=FlatPatch(8, PIXEL_ARCMIN))
    with pytest.raises(ValueError, match=r"30 arcmin pixels .*patch\.pixel_arcmin=3"):
        load_training_image(path, patch=FlatPatch(4, 3.0))
