"""HEALPix map and mask reading, validation and writing (pipeline/skymap.py).

References: healpy (read_map, reorder, ud_grade, mask_bad) for ordering, cut-sky
files, bad-pixel and regrid behaviour; unit factors K/mK/uK are facts of the trade
(common practice, no source).  Fixtures are tiny FITS files (Nside 8-32) written
in tmp_path during the tests.
"""
from __future__ import annotations

import numpy as np
import healpy as hp
import pytest
from astropy.io import fits

from twinring.config import InputError
from twinring.skymap import load_map, write_map


def sky(nside=16, seed=0):
    """A random-looking smooth-ish map in uK (values of order 100)."""
    rng = np.random.default_rng(seed)
    return rng.normal(0.0, 100.0, hp.nside2npix(nside))


def hp_write(path, maps, **kw):
    kw.setdefault("overwrite", True)
    hp.write_map(str(path), maps, **kw)
    return path


def table_file(path, data, header_cards=(), unit=None, name="T"):
    """A FITS file with one binary-table column and exactly the given header cards."""
    col = fits.Column(name=name, format="D", array=np.asarray(data, float), unit=unit)
    hdu = fits.BinTableHDU.from_columns([col])
    for k, v in header_cards:
        hdu.header[k] = v
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path, overwrite=True)
    return path


def assert_one_line_error(exc_info, path, *words):
    msg = str(exc_info.value)
    assert "\n" not in msg
    assert msg.startswith(str(path)), msg
    assert "allowed:" in msg, msg
    for w in words:
        assert w.lower() in msg.lower(), msg


# --------------------------------------------------------------------------- units
# Factors between K, mK and uK: common practice, no source.  K_CMB etc. name the
# same thermodynamic temperature (Planck-style unit strings).
@pytest.mark.parametrize("unit,scale", [("K", 1e-6), ("K_CMB", 1e-6), ("Kcmb", 1e-6), ("mK", 1e-3),
                                        ("mK_CMB", 1e-3), ("uK", 1.0), ("uK_CMB", 1.0), ("muK", 1.0)])
def test_units_converted_to_uK(tmp_path, unit, scale):
    m = sky()
    f = hp_write(tmp_path / "m.fits", m * scale, column_units=unit, dtype=np.float64)
    s = load_map(f)
    assert s.unit_in == unit
    np.testing.assert_allclose(s.values, m, rtol=1e-12, atol=0)
    assert s.values.dtype == np.float64 and s.mask.dtype == np.float64
    assert np.all(s.mask == 1.0)


def test_no_unit_assumes_uK_with_note(tmp_path):
    m = sky()
    f = table_file(tmp_path / "m.fits", m, [("PIXTYPE", "HEALPIX"), ("ORDERING", "RING"), ("NSIDE", 16)])
    s = load_map(f)
    assert s.unit_in is None
    np.testing.assert_array_equal(s.values, m)
    assert any("no unit" in n and "uK assumed" in n for n in s.notes)


@pytest.mark.parametrize("unit", ["K_RJ", "MJy/sr"])
def test_unknown_unit_refused(tmp_path, unit):
    f = hp_write(tmp_path / "m.fits", sky(), column_units=unit)
    with pytest.raises(InputError) as e:
        load_map(f)
    assert_one_line_error(e, f, unit, "mK")


# --------------------------------------------------------------------------- ordering, fields, frames
def test_nested_file_equals_ring_after_reorder(tmp_path):
    # reference: healpy.reorder and healpy.read_map (which converts NESTED -> RING when nest=False)
    m = sky(nside=32)
    ring = hp_write(tmp_path / "ring.fits", m, dtype=np.float64, column_units="uK")
    nest = hp_write(tmp_path / "nest.fits", hp.reorder(m, r2n=True), nest=True, dtype=np.float64,
                    column_units="uK")
    a, b = load_map(ring), load_map(nest)
    np.testing.assert_array_equal(b.values, a.values)
    np.testing.assert_array_equal(b.values, hp.read_map(str(nest), nest=False, dtype=np.float64))
    np.testing.assert_array_equal(a.values, m)
    assert any("NESTED" in n for n in b.notes)


def test_field_selects_column_and_frame_is_read(tmp_path):
    m0, m1 = sky(seed=1), sky(seed=2)
    f = hp_write(tmp_path / "two.fits", [m0, m1], column_units="uK", coord="G", dtype=[np.float64] * 2,
                 column_names=["T1", "T2"])     # healpy names two columns Q/U polarisation by default
    s = load_map(f, field=1)
    np.testing.assert_array_equal(s.values, m1)
    assert s.frame == "G" and s.nside == 16
    assert len(s.checksum) == 16


def test_float32_file_read_as_float64(tmp_path):
    m = sky()
    f = hp_write(tmp_path / "f32.fits", m, dtype=np.float32, column_units="mK")
    s = load_map(f)
    np.testing.assert_array_equal(s.values, m.astype(np.float32).astype(np.float64) * 1e3)


def test_no_healpix_keywords_but_12n2_pixels_is_accepted_with_note(tmp_path):
    m = sky(nside=8)
    f = table_file(tmp_path / "bare.fits", m, unit="uK")
    s = load_map(f)
    assert s.nside == 8
    np.testing.assert_array_equal(s.values, m)
    assert any("inferred" in n for n in s.notes) and any("RING assumed" in n for n in s.notes)


def test_cut_sky_file_matches_healpy_partial_reader(tmp_path):
    # reference: healpy.read_map(partial=True) fills unlisted pixels with UNSEEN
    m = sky()
    cut = m.copy()
    cut[hp.nside2npix(16) // 2:] = hp.UNSEEN
    f = hp_write(tmp_path / "cut.fits", cut, partial=True, column_units="K", dtype=np.float64)
    ref = hp.read_map(str(f), partial=True, dtype=np.float64)
    s = load_map(f)
    listed = ref != hp.UNSEEN
    np.testing.assert_array_equal(s.mask, listed.astype(float))
    np.testing.assert_allclose(s.values[listed], ref[listed] * 1e6, rtol=1e-12)
    assert np.all(s.values[~listed] == 0)


# --------------------------------------------------------------------------- bad pixels
def test_unseen_nan_inf_pixels_are_masked(tmp_path):
    m = sky()
    bad = np.zeros(m.size, bool)
    bad[[3, 100, 2000]] = True      # UNSEEN
    m[[3, 100, 2000]] = hp.UNSEEN
    m[[5, 6]] = np.nan
    m[[7]] = np.inf
    m[[8]] = -np.inf
    bad[[5, 6, 7, 8]] = True
    f = hp_write(tmp_path / "bad.fits", m, dtype=np.float32, column_units="uK")   # UNSEEN through float32
    s = load_map(f)
    # reference for UNSEEN: healpy.mask_bad on healpy's own reading of the file
    ref_bad = hp.mask_bad(hp.read_map(str(f))) | ~np.isfinite(hp.read_map(str(f)))
    np.testing.assert_array_equal(s.mask == 0, ref_bad)
    np.testing.assert_array_equal(s.mask == 0, bad)
    assert np.all(s.values[bad] == 0)
    np.testing.assert_allclose(s.values[~bad], m[~bad].astype(np.float32), rtol=1e-7)
    assert any("7 UNSEEN/NaN/inf" in n for n in s.notes)


# --------------------------------------------------------------------------- masks
def test_mask_nested_other_nside_is_regridded_with_note(tmp_path):
    m = sky(nside=16)
    rng = np.random.default_rng(5)
    mk = (rng.random(hp.nside2npix(32)) > 0.3).astype(float)      # Nside 32 mask for an Nside 16 map
    mk[:2000] = 0
    mf = hp_write(tmp_path / "mask.fits", hp.reorder(mk, r2n=True), nest=True, dtype=np.float64)
    f = hp_write(tmp_path / "m.fits", m, column_units="uK", dtype=np.float64)
    s = load_map(f, mask_path=mf, mask_threshold=0.5)
    ref = (hp.ud_grade(mk, 16) >= 0.5).astype(float)       # reference: healpy.ud_grade (averaging)
    np.testing.assert_array_equal(s.mask, ref)
    assert 0 < s.mask.sum() < s.mask.size
    np.testing.assert_array_equal(s.values, m * ref)
    assert any("regridded" in n and "32" in n and "16" in n for n in s.notes)
    assert s.mask_path == str(mf) and s.mask_checksum


def test_nested_mask_same_nside_equals_ring_mask(tmp_path):
    # mask and map in different orderings: the mask is reordered (healpy.reorder reference), not refused
    m = sky()
    mk = (np.random.default_rng(6).random(m.size) > 0.5).astype(float)
    f = hp_write(tmp_path / "m.fits", m, dtype=np.float64)
    ring = hp_write(tmp_path / "ring.fits", mk, dtype=np.float64)
    nest = hp_write(tmp_path / "nest.fits", hp.reorder(mk, r2n=True), nest=True, dtype=np.float64)
    a, b = load_map(f, mask_path=ring), load_map(f, mask_path=nest)
    np.testing.assert_array_equal(a.mask, mk)
    np.testing.assert_array_equal(b.mask, mk)
    np.testing.assert_array_equal(b.values, m * mk)


def test_mask_threshold_applies_to_fractional_mask(tmp_path):
    m = sky()
    w = np.linspace(0, 1, m.size)                  # apodised-like mask values
    f = hp_write(tmp_path / "m.fits", m, column_units="uK", dtype=np.float64)
    mf = hp_write(tmp_path / "w.fits", w, dtype=np.float64)
    s = load_map(f, mask_path=mf, mask_threshold=0.75)
    np.testing.assert_array_equal(s.mask, (w >= 0.75).astype(float))


def test_mask_and_map_bad_pixels_combine(tmp_path):
    m = sky()
    m[10] = hp.UNSEEN
    mk = np.ones(m.size)
    mk[20] = 0
    f = hp_write(tmp_path / "m.fits", m, column_units="uK", dtype=np.float64)
    mf = hp_write(tmp_path / "k.fits", mk, dtype=np.float64)
    s = load_map(f, mask_path=mf)
    assert s.mask[10] == 0 and s.mask[20] == 0 and s.mask.sum() == m.size - 2


# --------------------------------------------------------------------------- bad inputs (issue 5 item 8)
def test_missing_file(tmp_path):
    p = tmp_path / "nope.fits"
    with pytest.raises(InputError) as e:
        load_map(p)
    assert_one_line_error(e, p, "not found")


def test_directory_is_not_a_map(tmp_path):
    with pytest.raises(InputError) as e:
        load_map(tmp_path)
    assert_one_line_error(e, tmp_path, "directory")


def test_unreadable_file(tmp_path, monkeypatch):
    # a permission error is simulated (tests may run as root, where chmod does not stop reading)
    p = hp_write(tmp_path / "m.fits", sky())
    import builtins

    real_open = builtins.open

    def deny(file, *a, **k):
        if str(file) == str(p):
            raise PermissionError(13, "Permission denied", str(file))
        return real_open(file, *a, **k)

    monkeypatch.setattr(builtins, "open", deny)
    with pytest.raises(InputError) as e:
        load_map(p)
    assert_one_line_error(e, p, "Permission denied")


def test_not_fits(tmp_path):
    p = tmp_path / "sky.fits"
    p.write_text("this is a text file, not FITS\n" * 10)
    with pytest.raises(InputError) as e:
        load_map(p)
    assert_one_line_error(e, p, "not FITS")


def test_empty_file(tmp_path):
    p = tmp_path / "empty.fits"
    p.write_bytes(b"")
    with pytest.raises(InputError) as e:
        load_map(p)
    assert_one_line_error(e, p, "empty")


@pytest.mark.parametrize("cut_blocks,extra", [(1, 1000), (3, 100), (3, 0)])
def test_truncated_fits(tmp_path, cut_blocks, extra):
    # FITS files are whole 2880-byte blocks (FITS standard 4.0, section 3.1); a cut at a block
    # boundary inside the data is caught when the column is read
    f = hp_write(tmp_path / "m.fits", sky(nside=32))
    data = f.read_bytes()
    t = tmp_path / "trunc.fits"
    t.write_bytes(data[: 2880 * cut_blocks + extra])
    with pytest.raises(InputError) as e:
        load_map(t)
    assert_one_line_error(e, t, "truncated")


def test_fits_image_without_table(tmp_path):
    p = tmp_path / "img.fits"
    fits.PrimaryHDU(np.zeros((10, 10))).writeto(p)
    with pytest.raises(InputError) as e:
        load_map(p)
    assert_one_line_error(e, p, "binary-table")


def test_fits_without_healpix_keywords(tmp_path):
    p = table_file(tmp_path / "table.fits", np.arange(1000.0))      # 1000 is not 12 n^2
    with pytest.raises(InputError) as e:
        load_map(p)
    assert_one_line_error(e, p, "no HEALPix keywords", "PIXTYPE")


def test_pixtype_not_healpix(tmp_path):
    p = table_file(tmp_path / "t.fits", sky(8), [("PIXTYPE", "GLESP")])
    with pytest.raises(InputError) as e:
        load_map(p)
    assert_one_line_error(e, p, "GLESP", "HEALPIX")


def test_wrong_pixel_count(tmp_path):
    p = table_file(tmp_path / "t.fits", sky(8), [("PIXTYPE", "HEALPIX"), ("ORDERING", "RING"), ("NSIDE", 16)])
    with pytest.raises(InputError) as e:
        load_map(p)
    assert_one_line_error(e, p, "768 pixels", "NSIDE = 16", "3072")


def test_bad_ordering_keyword(tmp_path):
    p = table_file(tmp_path / "t.fits", sky(8), [("PIXTYPE", "HEALPIX"), ("ORDERING", "SPIRAL"), ("NSIDE", 8)])
    with pytest.raises(InputError) as e:
        load_map(p)
    assert_one_line_error(e, p, "SPIRAL", "RING or NESTED")


def test_field_out_of_range(tmp_path):
    f = hp_write(tmp_path / "m.fits", [sky(), sky()])
    with pytest.raises(InputError) as e:
        load_map(f, field=2)
    assert_one_line_error(e, f, "field 2", "field 0 to 1")


def test_mask_field_out_of_range(tmp_path):
    f = hp_write(tmp_path / "m.fits", sky())
    mf = hp_write(tmp_path / "k.fits", np.ones(sky().size))
    with pytest.raises(InputError) as e:
        load_map(f, mask_path=mf, mask_field=3)
    assert_one_line_error(e, mf, "field 3")


def test_all_pixels_unseen(tmp_path):
    m = np.full(hp.nside2npix(8), hp.UNSEEN)
    m[:5] = np.nan
    f = hp_write(tmp_path / "m.fits", m)
    with pytest.raises(InputError) as e:
        load_map(f)
    assert_one_line_error(e, f, "all 768 pixels", "UNSEEN")


def test_mask_all_zero(tmp_path):
    f = hp_write(tmp_path / "m.fits", sky())
    mf = hp_write(tmp_path / "k.fits", np.zeros(sky().size))
    with pytest.raises(InputError) as e:
        load_map(f, mask_path=mf)
    assert_one_line_error(e, mf, "zero everywhere")


def test_mask_leaving_no_valid_map_pixel(tmp_path):
    m = sky()
    m[: m.size // 2] = hp.UNSEEN
    mk = np.zeros(m.size)
    mk[: m.size // 2] = 1
    f = hp_write(tmp_path / "m.fits", m)
    mf = hp_write(tmp_path / "k.fits", mk)
    with pytest.raises(InputError) as e:
        load_map(f, mask_path=mf)
    assert_one_line_error(e, mf, "no pixel")


def test_mask_in_other_frame(tmp_path):
    f = hp_write(tmp_path / "m.fits", sky(), coord="G")
    mf = hp_write(tmp_path / "k.fits", np.ones(sky().size), coord="C")
    with pytest.raises(InputError) as e:
        load_map(f, mask_path=mf)
    assert_one_line_error(e, mf, "COORDSYS", "'C'", "'G'")


def test_mask_in_same_frame_spelled_differently_is_fine(tmp_path):
    f = hp_write(tmp_path / "m.fits", sky(), coord="G")
    mf = table_file(tmp_path / "k.fits", np.ones(sky().size),
                    [("PIXTYPE", "HEALPIX"), ("ORDERING", "RING"), ("NSIDE", 16), ("COORDSYS", "GALACTIC")])
    assert load_map(f, mask_path=mf).frame == "G"


# --------------------------------------------------------------------------- writing
def test_write_map_roundtrip_with_provenance(tmp_path):
    m0, m1 = sky(seed=3), (sky(seed=4) > 0).astype(float)
    p = write_map(tmp_path / "out.fits", [m0, m1], column_names=["TEMPERATURE", "MASK"],
                  extra_header=[("LMAX", 40, "band limit")],
                  provenance={"tool": "twinring", "config_hash": "0123456789abcdef", "sha256_map": "feedbeef"},
                  coord="G")
    hdr = fits.getheader(p, 1)
    assert hdr["LMAX"] == 40 and hdr["TOOL"] == "twinring"
    assert hdr["CONFIG_HASH"] == "0123456789abcdef" and hdr["SHA256_MAP"] == "feedbeef"
    assert hdr["TUNIT1"] == "uK" and hdr["COORDSYS"] == "G"
    # reference reader: healpy
    back = hp.read_map(str(p), field=(0, 1), dtype=np.float64)
    np.testing.assert_array_equal(back[0], m0)
    np.testing.assert_array_equal(back[1], m1)
    s = load_map(p, mask_path=p, mask_field=1)
    np.testing.assert_array_equal(s.mask, m1)


def test_write_map_nested_flag(tmp_path):
    m = sky()
    p = write_map(tmp_path / "n.fits", hp.reorder(m, r2n=True), nest=True)
    assert fits.getheader(p, 1)["ORDERING"] == "NESTED"
    np.testing.assert_array_equal(load_map(p).values, m)


def test_write_map_failure_keeps_earlier_file(tmp_path, monkeypatch):
    p = write_map(tmp_path / "keep.fits", sky(seed=7))
    before = p.read_bytes()

    def broken(filename, *a, **k):
        with open(filename, "wb") as fh:
            fh.write(b"SIMPLE  = half a file")
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(hp, "write_map", broken)
    with pytest.raises(InputError) as e:
        write_map(p, sky(seed=8))
    assert "No space left" in str(e.value)
    assert p.read_bytes() == before
    assert [x.name for x in tmp_path.iterdir()] == ["keep.fits"]     # no temporary left behind
