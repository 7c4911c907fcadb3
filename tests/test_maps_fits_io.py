"""FITS files of HEALPix maps (maps/fits_io.py): columns, units, COSMO/IAU, atomic writes.

Checked against healpy's own reader and writer (read_map, write_map) and the HEALPix
polarization convention (IAU and COSMO differ by the sign of U).
"""

import healpy as hp
import numpy as np
import pytest
from astropy.io import fits

from skymoments.maps.fits_io import MapFileExistsError, read_healpix_map, write_healpix_map
from skymoments.maps.healpix import UNSEEN, synfast_tqu

# --- FITS I/O ----------------------------------------------------------------------------


@pytest.fixture()
def small_tqu():
    ell = np.arange(48, dtype=float)
    ee = np.where(ell > 1, 50.0 / np.maximum(ell, 1.0) ** 1.5, 0.0)
    cls = {"TT": 100.0 * ee, "EE": ee, "BB": 0.3 * ee, "TE": 0.5 * np.sqrt(100.0) * ee}
    return synfast_tqu(cls, 16, seed=8)


def test_fits_round_trip_cosmo_and_iau(tmp_path, small_tqu):
    names = ("T", "Q", "U")
    p_cosmo = write_healpix_map(tmp_path / "cosmo.fits", small_tqu, names)
    p_iau = write_healpix_map(tmp_path / "iau.fits", small_tqu, names, convention="IAU")
    for path in (p_cosmo, p_iau):
        back = read_healpix_map(path, fields=("T", "Q", "U"))
        np.testing.assert_array_equal(back, small_tqu)  # float64 written and read exactly
    # On disk the IAU file has U negated and says so (HEALPix: IAU = COSMO with -U).
    with fits.open(p_iau) as hdul:
        assert hdul[1].header["POLCCONV"] == "IAU"
    raw = hp.read_map(str(p_iau), field=(1, 2))
    np.testing.assert_array_equal(raw[1], -small_tqu[2])
    np.testing.assert_array_equal(raw[0], small_tqu[1])
    # Asking for IAU output flips U back.
    np.testing.assert_array_equal(read_healpix_map(p_cosmo, convention="IAU")[1], -small_tqu[2])


def test_fits_written_by_healpy(tmp_path, small_tqu):
    # Files from elsewhere: healpy's default column names, no POLCCONV (= COSMO), NESTED
    # ordering, and units in K_CMB.
    path = tmp_path / "plain.fits"
    nested = np.array([hp.reorder(m, r2n=True) for m in small_tqu]) * 1e-6
    hp.write_map(str(path), nested, nest=True, column_units="K_CMB", dtype=np.float64)
    back = read_healpix_map(path, fields=("T", "Q", "U"))
    np.testing.assert_allclose(back, small_tqu, rtol=1e-12)
    np.testing.assert_allclose(read_healpix_map(path, fields=(2,)), small_tqu[2:], rtol=1e-12)
    # IAU written by someone else: U comes back negated into COSMO.
    iau = tmp_path / "iau_plain.fits"
    hp.write_map(str(iau), small_tqu, extra_header=[("POLCCONV", "IAU")], dtype=np.float64)
    np.testing.assert_array_equal(read_healpix_map(iau)[1], -small_tqu[2])


def test_fits_unseen_survives_flip_and_units(tmp_path, small_tqu):
    maps = small_tqu.copy()
    maps[:, :10] = UNSEEN
    path = write_healpix_map(
        tmp_path / "partial.fits", maps, ("T", "Q", "U"), units="mK", convention="IAU"
    )
    back = read_healpix_map(path, fields=("Q", "U"))
    assert np.all(back[:, :10] == UNSEEN)
    np.testing.assert_allclose(back[:, 10:], maps[1:, 10:] * 1e3, rtol=1e-12)


def test_fits_errors(tmp_path, small_tqu):
    path = tmp_path / "odd.fits"
    hp.write_map(str(path), small_tqu, extra_header=[("POLCCONV", "WEIRD")], dtype=np.float64)
    with pytest.raises(ValueError, match=r"POLCCONV = 'WEIRD'.*COSMO, IAU"):
        read_healpix_map(path)
    only_t = tmp_path / "t.fits"
    write_healpix_map(only_t, small_tqu[0], ("I_STOKES",))
    with pytest.raises(ValueError, match=r"no column 'Q'.*I_STOKES"):
        read_healpix_map(only_t)
    np.testing.assert_array_equal(read_healpix_map(only_t, fields=("T",))[0], small_tqu[0])
    with pytest.raises(ValueError, match="out of range"):
        read_healpix_map(only_t, fields=(3,))
    with pytest.raises(ValueError, match="no HEALPix FITS file"):
        read_healpix_map(tmp_path / "missing.fits")
    units = tmp_path / "mjy.fits"
    hp.write_map(str(units), small_tqu, column_units="MJy/sr", dtype=np.float64)
    with pytest.raises(ValueError, match="MJy/sr"):
        read_healpix_map(units)
    assert read_healpix_map(units, units=None).shape == (2, small_tqu.shape[1])


def test_fits_write_is_atomic_and_refuses_to_overwrite(tmp_path, small_tqu):
    path = write_healpix_map(tmp_path / "m.fits", small_tqu[1:], ("Q", "U"))
    before = path.read_bytes()
    with pytest.raises(MapFileExistsError, match="overwrite=True"):
        write_healpix_map(path, 2 * small_tqu[1:], ("Q", "U"))
    assert issubclass(MapFileExistsError, ValueError)
    assert path.read_bytes() == before
    write_healpix_map(
        path, 2 * small_tqu[1:], ("Q", "U"), overwrite=True, extra_header={"ORIGIN": "test"}
    )
    np.testing.assert_array_equal(read_healpix_map(path), 2 * small_tqu[1:])
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.fits"]  # no temp file left
    bad = small_tqu.copy()
    bad[0, 0] = np.nan
    with pytest.raises(ValueError, match="NaN"):
        write_healpix_map(tmp_path / "nan.fits", bad, ("T", "Q", "U"))
    with pytest.raises(ValueError, match="column_names"):
        write_healpix_map(tmp_path / "x.fits", small_tqu, ("T", "Q"))
    with pytest.raises(ValueError, match="convention"):
        write_healpix_map(tmp_path / "x.fits", small_tqu, ("T", "Q", "U"), convention="GALACTIC")
    with pytest.raises(ValueError, match="POLCCONV"):
        write_healpix_map(
            tmp_path / "x.fits", small_tqu, ("T", "Q", "U"), extra_header=[("POLCCONV", "IAU")]
        )
    with pytest.raises(ValueError, match="npix"):
        write_healpix_map(tmp_path / "x.fits", small_tqu[:, :100], ("T", "Q", "U"))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.fits"]
