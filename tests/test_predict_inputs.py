"""Prediction inputs: readers, pixel-size keywords, Q/U frames, and the refusals (no model)."""

from __future__ import annotations

import numpy as np
import pytest
from astropy.io import fits

from skymoments.maps import FlatPatch
from skymoments.predict.inputs import (
    check_patch_geometry,
    detect_format,
    parse_centres,
    read_input,
    to_patch_frame,
)
from skymoments.predict.outputs import check_outputs, output_paths

NPIX, PIXEL = 16, 60.0


def make_qu(m=3, npix=NPIX, seed=0):
    """Seeded Q/U batch (m, 2, n, n) in uK, with distinct channel amplitudes."""
    rng = np.random.default_rng(seed)
    return rng.normal(size=(m, 2, npix, npix)) * np.array([5.0, 2.0])[None, :, None, None]


def write_cube(path, data, **cards):
    hdu = fits.PrimaryHDU(np.asarray(data, dtype=np.float64))
    for key, value in cards.items():
        hdu.header[key] = value
    hdu.writeto(path)
    return path


def write_qu_extensions(path, q, u, q_cards, u_cards=None):
    hq = fits.ImageHDU(np.asarray(q, dtype=np.float64), name="Q")
    hu = fits.ImageHDU(np.asarray(u, dtype=np.float64), name="U")
    for key, value in q_cards.items():
        hq.header[key] = value
    for key, value in (u_cards if u_cards is not None else q_cards).items():
        hu.header[key] = value
    fits.HDUList([fits.PrimaryHDU(), hq, hu]).writeto(path)
    return path


# --- arrays ------------------------------------------------------------------------------


def test_npy_patch_and_batch_read_as_a_batch(tmp_path):
    qu = make_qu(m=1)
    np.save(tmp_path / "one.npy", qu[0])
    np.save(tmp_path / "many.npy", make_qu(m=3))
    one = read_input(tmp_path / "one.npy", pixel_arcmin=PIXEL)
    many = read_input(tmp_path / "many.npy", pixel_arcmin=PIXEL)
    assert one.kind == "array" and one.data_qu.shape == (1, 2, NPIX, NPIX)
    # A plain read: the values are the file's, bit for bit.
    np.testing.assert_array_equal(one.data_qu[0], qu[0])
    assert many.data_qu.shape == (3, 2, NPIX, NPIX)
    assert one.pixel_source == "predict.pixel_arcmin"
    # hashlib reference: the digest is of the file's bytes.
    import hashlib

    assert one.sha256 == hashlib.sha256((tmp_path / "one.npy").read_bytes()).hexdigest()


def test_npy_without_pixel_size_is_refused(tmp_path):
    np.save(tmp_path / "p.npy", make_qu(m=1)[0])
    with pytest.raises(ValueError, match=r"pixel size .* unknown.*predict\.pixel_arcmin"):
        read_input(tmp_path / "p.npy")


def test_npz_key_default_and_pixel_size_from_file(tmp_path):
    qu = make_qu(m=2)
    np.savez(tmp_path / "sim.npz", data_qu=qu, signal_qu=qu * 0, npix=NPIX, pixel_arcmin=PIXEL)
    inp = read_input(tmp_path / "sim.npz")
    np.testing.assert_array_equal(inp.data_qu, qu)
    assert inp.pixel_arcmin == PIXEL and "pixel_arcmin" in inp.pixel_source
    other = read_input(tmp_path / "sim.npz", key="signal_qu")
    assert np.all(other.data_qu == 0)
    with pytest.raises(ValueError, match=r"no array 'nope'.*predict\.key"):
        read_input(tmp_path / "sim.npz", key="nope")
    # The file's pixel size and an override must agree.
    with pytest.raises(ValueError, match="drop the override"):
        read_input(tmp_path / "sim.npz", pixel_arcmin=2 * PIXEL)
    np.savez(tmp_path / "two.npz", a=qu, b=qu)
    with pytest.raises(ValueError, match="predict.key"):
        read_input(tmp_path / "two.npz", pixel_arcmin=PIXEL)
    np.savez(tmp_path / "only.npz", maps=qu)
    np.testing.assert_array_equal(read_input(tmp_path / "only.npz", pixel_arcmin=PIXEL).data_qu, qu)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_non_finite_values_are_refused(tmp_path, bad):
    qu = make_qu(m=2)
    qu[1, 0, 3, 4] = bad
    np.save(tmp_path / "bad.npy", qu)
    with pytest.raises(
        ValueError, match=r"1 NaN or infinite values \(first at index \(1, 0, 3, 4\)\)"
    ):
        read_input(tmp_path / "bad.npy", pixel_arcmin=PIXEL)


def test_bad_shapes_are_refused(tmp_path):
    np.save(tmp_path / "three.npy", np.zeros((3, NPIX, NPIX)))
    with pytest.raises(ValueError, match=r"expected one Q/U patch \(2, n, n\)"):
        read_input(tmp_path / "three.npy", pixel_arcmin=PIXEL)
    np.save(tmp_path / "rect.npy", np.zeros((2, NPIX, NPIX + 2)))
    with pytest.raises(ValueError, match="square patches"):
        read_input(tmp_path / "rect.npy", pixel_arcmin=PIXEL)
    (tmp_path / "map.txt").write_text("1 2\n")
    with pytest.raises(ValueError, match="suffix '.txt'"):
        read_input(tmp_path / "map.txt")
    with pytest.raises(ValueError, match="no such file"):
        read_input(tmp_path / "missing.npy")


def test_geometry_mismatch_names_both_geometries():
    from skymoments.predict.inputs import MapInput

    model = FlatPatch(NPIX, PIXEL)
    size = MapInput(
        path=__file__,
        kind="array",
        sha256="",
        data_qu=make_qu(npix=32),
        pixel_arcmin=PIXEL,
        pixel_source="predict.pixel_arcmin",
    )
    with pytest.raises(ValueError, match=r"32x32-pixel patches .* trained on 16x16"):
        check_patch_geometry(size, model)
    pixel = MapInput(
        path=__file__,
        kind="array",
        sha256="",
        data_qu=make_qu(),
        pixel_arcmin=30.0,
        pixel_source="FITS keyword PIXARCM",
    )
    with pytest.raises(ValueError, match=r"30 arcmin pixels \(FITS keyword PIXARCM\).*60 arcmin"):
        check_patch_geometry(pixel, model)
    # Within the stated tolerance (1e-6 relative, decimal round trips) a size matches.
    close = MapInput(
        path=__file__, kind="array", sha256="", data_qu=make_qu(), pixel_arcmin=PIXEL * (1 + 1e-9)
    )
    check_patch_geometry(close, model)


# --- FITS images -------------------------------------------------------------------------


def test_fits_cube_with_pixarcm_reads_like_the_array(tmp_path):
    qu = make_qu(m=2)
    path = write_cube(tmp_path / "cube.fits", qu, PIXARCM=PIXEL, BUNIT="uK")
    assert detect_format(path) == "image"
    inp = read_input(path)
    assert inp.kind == "image" and inp.pixel_arcmin == PIXEL
    assert inp.pixel_source == "FITS keyword PIXARCM"
    np.testing.assert_array_equal(inp.data_qu, qu)


def test_fits_extensions_with_cdelt_in_degrees_and_kelvin(tmp_path):
    qu = make_qu(m=1)[0]
    cards = {"CDELT1": PIXEL / 60.0, "CDELT2": PIXEL / 60.0, "BUNIT": "K_CMB"}
    path = write_qu_extensions(tmp_path / "qu.fits", qu[0] * 1e-6, qu[1] * 1e-6, cards)
    inp = read_input(path)
    # CDELT in deg -> arcmin is a factor 60 (exact in binary for 1.0 deg).
    assert inp.pixel_arcmin == pytest.approx(PIXEL, rel=1e-12)
    # K -> uK is a factor 1e6; the file held float64, so round-off is ~1e-16 relative.
    np.testing.assert_allclose(inp.data_qu[0], qu, rtol=1e-12)
    assert "converted from K_CMB to uK" in inp.notes


def test_fits_pixel_size_rules(tmp_path):
    qu = make_qu(m=1)[0]
    bare = write_cube(tmp_path / "bare.fits", qu)
    with pytest.raises(ValueError, match=r"no PIXARCM or CDELT1/CDELT2.*predict\.pixel_arcmin"):
        read_input(bare)
    assert read_input(bare, pixel_arcmin=PIXEL).pixel_arcmin == PIXEL
    rect = write_cube(tmp_path / "rect.fits", qu, CDELT1=1.0, CDELT2=0.5)
    with pytest.raises(ValueError, match="non-square pixels"):
        read_input(rect)
    both = write_cube(tmp_path / "both.fits", qu, PIXARCM=30.0, CDELT1=1.0, CDELT2=1.0)
    with pytest.raises(ValueError, match="PIXARCM = 30 arcmin but CDELT1/2 give 60"):
        read_input(both)
    arcmin = write_cube(
        tmp_path / "am.fits", qu, CDELT1=60.0, CDELT2=60.0, CUNIT1="arcmin", CUNIT2="arcmin"
    )
    assert read_input(arcmin).pixel_arcmin == PIXEL
    unit = write_cube(tmp_path / "jy.fits", qu, PIXARCM=PIXEL, BUNIT="MJy/sr")
    with pytest.raises(ValueError, match="BUNIT = 'MJy/sr'"):
        read_input(unit)


def test_fits_without_qu_is_refused(tmp_path):
    path = write_cube(tmp_path / "t.fits", np.zeros((NPIX, NPIX)), PIXARCM=PIXEL)
    with pytest.raises(ValueError, match="holds no Q/U image"):
        read_input(path)


def test_flat_conventions_and_unknown_polcconv(tmp_path):
    qu = make_qu(m=1)[0]
    # Analytic: with x east and y north, (Q, U)_patch = -(Q, U)_COSMO (the spin-2 rotation
    # by 90 degrees from south to east, maps.healpix docstring) and IAU = COSMO with U
    # negated. Files in those conventions therefore read back to the same patch-frame maps.
    cosmo = write_cube(tmp_path / "c.fits", -qu, PIXARCM=PIXEL, POLCCONV="COSMO")
    iau = write_cube(tmp_path / "i.fits", np.stack([-qu[0], qu[1]]), PIXARCM=PIXEL, POLCCONV="IAU")
    for path in (cosmo, iau):
        np.testing.assert_array_equal(read_input(path).data_qu[0], qu)
    # The config's default convention applies when the card is missing.
    bare = write_cube(tmp_path / "b.fits", -qu, PIXARCM=PIXEL)
    np.testing.assert_array_equal(read_input(bare, convention="COSMO").data_qu[0], qu)
    weird = write_cube(tmp_path / "w.fits", qu, PIXARCM=PIXEL, POLCCONV="HEALPIX")
    with pytest.raises(ValueError, match=r"POLCCONV .* = 'HEALPIX' is not a known polarization"):
        read_input(weird)
    # Twice the same frame change is the identity (spin-2 rotation by 180 deg, or U -> -U
    # twice).
    np.testing.assert_array_equal(to_patch_frame(to_patch_frame(qu, "COSMO"), "COSMO"), qu)


def test_negative_cdelt1_mirrors_columns_and_u_in_the_patch_frame(tmp_path):
    qu = make_qu(m=1)[0]
    # A mirror x -> -x maps the angle psi to pi - psi: Q stays, U changes sign (maps.symmetry:
    # a flip changes the sign of U). The file holds the mirror image in its own array frame.
    mirrored = np.stack([qu[0][:, ::-1], -qu[1][:, ::-1]])
    path = write_cube(tmp_path / "m.fits", mirrored, CDELT1=-1.0, CDELT2=1.0)
    inp = read_input(path)
    np.testing.assert_array_equal(inp.data_qu[0], qu)
    assert "columns mirrored (CDELT1 < 0)" in inp.notes
    # In a sky frame (COSMO) only the pixels move: Q/U are referred to north and east.
    sky = write_cube(
        tmp_path / "s.fits", -qu[:, :, ::-1], CDELT1=-1.0, CDELT2=1.0, POLCCONV="COSMO"
    )
    np.testing.assert_array_equal(read_input(sky).data_qu[0], qu)


def test_flat_cosmo_rule_agrees_with_the_healpix_cut_near_the_equator():
    # Outside reference: maps.healpix.cut_patch (tested against healpy) on a uniform pure-Q
    # COSMO sky. At the centre of a gnomonic cut e_x = e_phi, so (Q, U)_patch = -(Q, U)_COSMO
    # there, which is the flat rule. Away from the centre: about the equator the meridians
    # are the straight lines x = tan(lon), while the parallels tilt by about x*y; the patch
    # frame angle is the mean of the two axis angles (maps.healpix), so the spin-2 field
    # turns by 2 * (x y / 2) = x y, to first order. Hence |U_patch| <= 3 |x y|_max and
    # |Q_patch + 3| <= 3 (x y)^2 / 2; the 5% margin covers the higher orders (relative size
    # x^2 ~ 0.3% at these 3-degree offsets). nside 256 (13.7 arcmin pixels) keeps the
    # bilinear route's own frame transport negligible: it carries each neighbour's Q/U into
    # the target pixel's frame, an angle of about dlon * sin(lat) <= 0.004 * 0.06 rad here.
    import healpy as hp

    from skymoments.maps.healpix import cut_patch

    nside, patch = 256, FlatPatch(NPIX, 25.0)
    q = np.full(hp.nside2npix(nside), 3.0)
    cut = cut_patch(np.stack([q, np.zeros_like(q)]), 0.0, 0.0, patch, rotate_alms=False)
    flat = to_patch_frame(np.array([3.0, 0.0]).reshape(2, 1, 1), "COSMO")
    corner = 0.5 * (NPIX - 1) * patch.pixel_rad  # largest |x| = |y| of a pixel centre
    xy_max = corner**2
    assert np.max(np.abs(cut[1] - flat[1, 0, 0])) <= 1.05 * 3.0 * xy_max
    assert np.max(np.abs(cut[0] - flat[0, 0, 0])) <= 1.05 * 3.0 * xy_max**2 / 2


# --- HEALPix -----------------------------------------------------------------------------


def _write_healpix(path, maps, names, **cards):
    from skymoments.maps.fits_io import write_healpix_map

    write_healpix_map(path, maps, column_names=names)
    if cards:
        with fits.open(path, mode="update") as hdul:
            for key, value in cards.items():
                hdul[1].header[key] = value
    return path


def _sky(nside=16, seed=1):
    rng = np.random.default_rng(seed)
    import healpy as hp

    return rng.normal(size=(3, hp.nside2npix(nside)))


def test_healpix_read_and_refusals(tmp_path):
    tqu = _sky()
    good = _write_healpix(tmp_path / "tqu.fits", tqu, ("T", "Q", "U"))
    assert detect_format(good) == "healpix"
    inp = read_input(good)
    assert inp.kind == "healpix" and inp.nside == 16 and inp.convention == "COSMO"
    # float64 columns written and read back by healpy: exact.
    np.testing.assert_array_equal(inp.maps_qu, tqu[1:])

    iau = _write_healpix(tmp_path / "iau.fits", tqu, ("T", "Q", "U"), POLCCONV="IAU")
    # HEALPix documentation: IAU and COSMO differ by the sign of U.
    np.testing.assert_array_equal(read_input(iau).maps_qu, tqu[1:] * np.array([[1.0], [-1.0]]))

    no_u = _write_healpix(tmp_path / "tq.fits", tqu[:2], ("T", "Q"))
    with pytest.raises(ValueError, match=r"no column 'U'; available columns: \['T', 'Q'\]"):
        read_input(no_u)
    weird = _write_healpix(tmp_path / "w.fits", tqu, ("T", "Q", "U"), POLCCONV="GALACTIC")
    with pytest.raises(ValueError, match="unknown polarization convention"):
        read_input(weird)
    nan = _write_healpix(tmp_path / "nan.fits", tqu, ("T", "Q", "U"))
    with fits.open(nan, mode="update") as hdul:
        hdul[1].data["Q"].flat[7] = np.nan
    with pytest.raises(ValueError, match="NaN or infinite"):
        read_input(nan)
    from skymoments.maps.healpix import UNSEEN

    masked = tqu.copy()
    masked[2, :5] = UNSEEN
    partial = _write_healpix(tmp_path / "part.fits", masked, ("T", "Q", "U"))
    with pytest.raises(ValueError, match=r"5 UNSEEN .* full-sky map"):
        read_input(partial)
    with pytest.raises(ValueError, match="predict.pixel_arcmin is for flat inputs"):
        read_input(good, pixel_arcmin=PIXEL)


def test_centres_parsing(tmp_path):
    np.testing.assert_array_equal(parse_centres([[10, -20], [30, 40]]), [[10, -20], [30, 40]])
    assert parse_centres([5, 6]).shape == (1, 2)
    (tmp_path / "c.txt").write_text("# lon lat\n10, -20\n30 40\n")
    np.testing.assert_array_equal(parse_centres(str(tmp_path / "c.txt")), [[10, -20], [30, 40]])
    with pytest.raises(ValueError, match="needs patch centres"):
        parse_centres(None)
    with pytest.raises(ValueError, match=r"latitude in \[-90, 90\]"):
        parse_centres([[0, 95]])
    with pytest.raises(ValueError, match="pairs"):
        parse_centres([[1, 2, 3]])


def test_existing_outputs_are_refused_without_force(tmp_path):
    paths = output_paths(tmp_path, "posterior", healpix=True)
    assert sorted(p.name for p in paths.values()) == [
        "posterior.fits",
        "posterior.npz",
        "posterior.png",
        "posterior_healpix.fits",
    ]
    check_outputs(paths, force=False)
    paths["fits"].write_text("old")
    with pytest.raises(
        ValueError, match=r"posterior\.fits already exists; pass predict\.force=true"
    ):
        check_outputs(paths, force=False)
    check_outputs(paths, force=True)
    with pytest.raises(ValueError, match="plain file stem"):
        output_paths(tmp_path, "../x", healpix=False)
