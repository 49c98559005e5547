"""Map preparation (pipeline/prepare.py): monopole/dipole removal, beam, band limit, mask regrid.

References: healpy.fit_dipole (least-squares monopole + dipole on unmasked
pixels), healpy.map2alm / smoothalm / alm2map / anafast (harmonic steps),
healpy.ud_grade (mask averaging).  Maps are made with healpy.synfast in the test.
"""
from __future__ import annotations

import numpy as np
import healpy as hp
import pytest
from astropy.io import fits

from twinring.config import InputError, PrepareSection, config_from_dict
from twinring.skymap import SkyMap, load_map, write_map
from twinring.prepare import (fit_monopole_dipole, load_and_prepare, prepare_map, read_prepared,
                              remove_monopole_dipole, write_prepared)


def small_scale_field(nside, lmin, lmax, rms, seed):
    """Gaussian field with a flat-ish spectrum on lmin <= l <= lmax, scaled to ``rms`` uK."""
    ell = np.arange(lmax + 1)
    cl = np.where(ell >= lmin, 1.0 / (ell + 1.0) ** 2, 0.0)
    np.random.seed(seed)      # healpy.synfast draws from numpy's legacy global generator
    m = hp.synfast(cl, nside, lmax=lmax, new=True)
    return m / m.std() * rms


def galactic_cut_mask(nside, zcut=0.25):
    z = hp.pix2vec(nside, np.arange(hp.nside2npix(nside)))[2]
    mask = (np.abs(z) > zcut).astype(float)
    disc = hp.query_disc(nside, hp.ang2vec(np.radians(40), np.radians(120)), np.radians(15))
    mask[disc] = 0
    return mask


def make_sky(values, mask, notes=()):
    return SkyMap(values=np.asarray(values, float), mask=np.asarray(mask, float), nside=hp.npix2nside(len(values)),
                  unit_in="uK", frame="G", checksum="0" * 16, notes=list(notes), path="synthetic.fits")


def with_unseen(m, mask):
    out = np.array(m, float)
    out[mask == 0] = hp.UNSEEN
    return out


# --------------------------------------------------------------------------- monopole and dipole
MONO = 50.0
DIP = np.array([300.0, -200.0, 150.0])


def dipole_sky(nside=32, seed=3):
    x, y, z = hp.pix2vec(nside, np.arange(hp.nside2npix(nside)))
    field = small_scale_field(nside, 10, 3 * nside - 1, 5.0, seed)
    return MONO + DIP[0] * x + DIP[1] * y + DIP[2] * z + field


def test_pure_monopole_dipole_recovered_exactly():
    # from the model T = a + d.n itself: a noise-free map must be fitted exactly, also on a cut sky
    nside = 16
    x, y, z = hp.pix2vec(nside, np.arange(hp.nside2npix(nside)))
    m = MONO + DIP @ np.stack([x, y, z])
    mask = galactic_cut_mask(nside)
    coeffs = fit_monopole_dipole(m, mask)
    np.testing.assert_allclose(coeffs, [MONO, *DIP], rtol=1e-10)


def test_dipole_fit_matches_healpy_on_masked_sky():
    nside = 32
    m = dipole_sky(nside)
    mask = galactic_cut_mask(nside)
    cleaned, coeffs = remove_monopole_dipole(m * mask, mask)
    # reference: healpy.fit_dipole on the same unmasked pixels (masked ones marked UNSEEN)
    mono_ref, dip_ref = hp.fit_dipole(with_unseen(m, mask))
    np.testing.assert_allclose(coeffs[0], mono_ref, rtol=1e-9)
    np.testing.assert_allclose(coeffs[1:], dip_ref, rtol=1e-9)
    # and close to the injected values: the 5 uK small-scale field (l >= 10) moves them by < 1 uK
    assert abs(coeffs[0] - MONO) < 1.0
    np.testing.assert_allclose(coeffs[1:], DIP, atol=1.0)
    # the cleaned map has no monopole or dipole left on the unmasked sky (healpy.fit_dipole)
    mono_left, dip_left = hp.fit_dipole(with_unseen(cleaned, mask))
    assert abs(mono_left) < 1e-9 * MONO and np.all(np.abs(dip_left) < 1e-9 * np.abs(DIP).max())
    assert np.all(cleaned[mask == 0] == 0)
    # unmasked pixels keep everything but the fitted model
    x, y, z = hp.pix2vec(nside, np.arange(m.size))
    model = coeffs[0] + coeffs[1] * x + coeffs[2] * y + coeffs[3] * z
    np.testing.assert_allclose(cleaned[mask > 0], (m - model)[mask > 0], atol=1e-9)


def test_dipole_fit_ignores_values_under_the_mask():
    nside = 16
    m = dipole_sky(nside)
    mask = galactic_cut_mask(nside)
    junk = np.where(mask > 0, m, 1e6)       # huge values in masked pixels must not matter
    np.testing.assert_allclose(fit_monopole_dipole(junk, mask), fit_monopole_dipole(m * mask, mask), rtol=1e-12)


def test_prepare_removes_dipole_before_transform():
    nside = 32
    m = dipole_sky(nside)
    mask = galactic_cut_mask(nside)
    prep = PrepareSection(nside=32, fwhm_deg=0.0, lmax=64, lmin=0, remove_dipole=True, iterations=3)
    p = prepare_map(make_sky(m * mask, mask), prep)
    mono_ref, dip_ref = hp.fit_dipole(with_unseen(m, mask))
    np.testing.assert_allclose(p.dipole, [mono_ref, *dip_ref], rtol=1e-9)
    # reference chain: healpy.remove_dipole on the cut sky, zeros under the mask, map2alm
    ref_map = hp.remove_dipole(with_unseen(m, mask))
    ref_map[mask == 0] = 0
    ref = hp.map2alm(ref_map, lmax=64, iter=3, use_weights=True)
    np.testing.assert_allclose(p.alm, ref, rtol=0, atol=1e-9 * np.abs(ref).max())


# --------------------------------------------------------------------------- band limit and beam
def test_band_limit_and_beam_match_healpy_smoothalm():
    nside, lmax, fwhm = 32, 48, 4.0
    m = small_scale_field(nside, 2, 3 * nside - 1, 30.0, seed=7)    # power well above lmax
    prep = PrepareSection(nside=nside, fwhm_deg=fwhm, lmax=lmax, lmin=2, remove_dipole=False, iterations=3)
    p = prepare_map(make_sky(m, np.ones(m.size)), prep)
    assert p.alm.dtype == np.complex128 and p.alm.size == hp.Alm.getsize(lmax) and p.lmax == lmax
    # reference: healpy.smoothalm(map2alm(map)) with l < 2 set to zero
    ref = hp.smoothalm(hp.map2alm(m, lmax=lmax, iter=3, use_weights=True), fwhm=np.radians(fwhm))
    ell, _ = hp.Alm.getlm(lmax)
    ref[ell < 2] = 0
    np.testing.assert_allclose(p.alm, ref, rtol=0, atol=1e-12 * np.abs(ref).max())
    np.testing.assert_allclose(p.map, hp.alm2map(ref, nside, lmax=lmax), rtol=0, atol=1e-9)
    # no power above lmax in the prepared map (anafast reference), while the input had plenty
    cl_in = hp.anafast(m, lmax=3 * nside - 1, iter=3)
    cl_out = hp.anafast(p.map, lmax=3 * nside - 1, iter=3)
    assert cl_in[lmax + 1:].min() > 1e-3 * cl_in[2:lmax + 1].max()
    # (what remains is healpy's quadrature error near 3 Nside, measured 1.4e-8)
    assert cl_out[lmax + 1:].max() < 1e-6 * cl_out[2:lmax + 1].max()
    # the beam shapes the spectrum: C_l(out) / C_l(in) = b_l^2 (healpy.gauss_beam)
    bl = hp.gauss_beam(np.radians(fwhm), lmax=lmax)
    # (0.5 % spread from anafast's quadrature of the un-band-limited input; b_l^2 = 0.13 at l = 48)
    np.testing.assert_allclose(cl_out[2:lmax + 1] / cl_in[2:lmax + 1], bl[2:] ** 2, rtol=1e-2)


def test_high_pass_below_lmin():
    nside, lmax = 16, 40
    m = small_scale_field(nside, 0, 3 * nside - 1, 30.0, seed=8) + 20.0
    prep = PrepareSection(nside=nside, fwhm_deg=2.0, lmax=lmax, lmin=6, remove_dipole=False)
    p = prepare_map(make_sky(m, np.ones(m.size)), prep)
    ell, _ = hp.Alm.getlm(lmax)
    ref = hp.smoothalm(hp.map2alm(m, lmax=lmax, iter=3, use_weights=True), fwhm=np.radians(2.0))
    assert np.all(p.alm[ell < 6] == 0)
    assert np.abs(ref[ell < 6]).max() > 1.0          # the input did have low multipoles
    np.testing.assert_allclose(p.alm[ell >= 6], ref[ell >= 6], atol=1e-12 * np.abs(ref).max())


def test_output_at_lower_nside_and_masked_pixels_zeroed():
    nside_in, nside_out, lmax = 32, 16, 40
    m = small_scale_field(nside_in, 2, 3 * nside_in - 1, 30.0, seed=9)
    mask = galactic_cut_mask(nside_in)
    junk = np.where(mask > 0, m, 1e5)           # values under the mask must not enter the transform
    prep = PrepareSection(nside=nside_out, fwhm_deg=3.0, lmax=lmax, lmin=2, remove_dipole=False)
    p = prepare_map(make_sky(junk, mask), prep)
    ref = hp.smoothalm(hp.map2alm(m * mask, lmax=lmax, iter=3, use_weights=True), fwhm=np.radians(3.0))
    ell, _ = hp.Alm.getlm(lmax)
    ref[ell < 2] = 0
    np.testing.assert_allclose(p.alm, ref, atol=1e-12 * np.abs(ref).max())
    np.testing.assert_allclose(p.map, hp.alm2map(ref, nside_out, lmax=lmax), atol=1e-9)
    assert p.nside == nside_out and p.map.size == hp.nside2npix(nside_out)


# --------------------------------------------------------------------------- mask at the output resolution
def test_output_mask_needs_all_subpixels_valid():
    nside_in, nside_out = 32, 16
    mask_nest = np.ones(hp.nside2npix(nside_in))
    # NESTED: the children of output pixel q are input pixels 4q..4q+3 (HEALPix hierarchy, Gorski et al. 2005)
    mask_nest[4 * 100] = 0                      # output pixel 100: 3 of 4 sub-pixels valid -> invalid
    mask_nest[4 * 200: 4 * 200 + 4] = 0         # output pixel 200: none valid
    mask = hp.reorder(mask_nest, n2r=True)
    m = small_scale_field(nside_in, 2, 60, 30.0, seed=10) * mask
    prep = PrepareSection(nside=nside_out, fwhm_deg=3.0, lmax=40, remove_dipole=False)
    p = prepare_map(make_sky(m, mask), prep)
    out_nest = hp.reorder(p.mask, r2n=True)
    assert out_nest[100] == 0 and out_nest[200] == 0 and out_nest.sum() == out_nest.size - 2
    # reference: healpy.ud_grade (sub-pixel average) thresholded at 0.99
    np.testing.assert_array_equal(p.mask, (hp.ud_grade(mask, nside_out) >= 0.99).astype(float))
    assert any("mask regridded" in n for n in p.notes)


def test_output_mask_upgraded_is_repeated():
    mask = galactic_cut_mask(8)
    m = small_scale_field(8, 2, 23, 30.0, seed=11) * mask
    p = prepare_map(make_sky(m, mask), PrepareSection(nside=32, fwhm_deg=5.0, lmax=20, remove_dipole=False))
    # reference: healpy.ud_grade repeats a parent value in its 16 children
    np.testing.assert_array_equal(p.mask, hp.ud_grade(mask, 32))


# --------------------------------------------------------------------------- bad inputs
def test_lmax_beyond_input_resolution_is_refused():
    m = small_scale_field(8, 2, 23, 30.0, seed=12)
    prep = PrepareSection(nside=16, lmax=40)          # valid for nside 16, but the map has Nside 8
    with pytest.raises(InputError) as e:
        prepare_map(make_sky(m, np.ones(m.size)), prep)
    msg = str(e.value)
    assert msg.startswith("synthetic.fits") and "prepare.lmax" in msg and "23" in msg and "allowed:" in msg


def test_mask_too_patchy_for_output_nside_is_refused():
    mask_nest = np.ones(hp.nside2npix(16))
    mask_nest[::4] = 0                                 # every output pixel loses one sub-pixel
    mask = hp.reorder(mask_nest, n2r=True)
    m = small_scale_field(16, 2, 47, 30.0, seed=13) * mask
    with pytest.raises(InputError) as e:
        prepare_map(make_sky(m, mask), PrepareSection(nside=8, lmax=20))
    assert "prepare.nside" in str(e.value) and "\n" not in str(e.value)


# --------------------------------------------------------------------------- edges
def test_write_and_read_prepared(tmp_path):
    m = dipole_sky(16)
    mask = galactic_cut_mask(16)
    p = prepare_map(make_sky(m * mask, mask), PrepareSection(nside=16, fwhm_deg=4.0, lmax=32))
    path = write_prepared(p, tmp_path / "run", {"tool": "twinring", "config_hash": "abcdef0123456789"})
    assert path.name == "prepared.fits"
    hdr = fits.getheader(path, 1)
    assert hdr["LMAX"] == 32 and hdr["FWHM_DEG"] == 4.0 and hdr["CONFIG_HASH"] == "abcdef0123456789"
    assert hdr["TTYPE1"] == "TEMPERATURE" and hdr["TTYPE2"] == "MASK" and hdr["TUNIT1"] == "uK"
    # reference readers: healpy.read_map and healpy.read_alm
    np.testing.assert_array_equal(hp.read_map(str(path), field=0, dtype=np.float64), p.map)
    np.testing.assert_array_equal(hp.read_map(str(path), field=1, dtype=np.float64), p.mask)
    np.testing.assert_array_equal(hp.read_alm(str(tmp_path / "run" / "prepared_alm.fits")), p.alm)
    q = read_prepared(tmp_path / "run")
    np.testing.assert_array_equal(q.alm, p.alm)
    np.testing.assert_array_equal(q.map, p.map)
    np.testing.assert_array_equal(q.mask, p.mask)
    assert q.lmax == 32 and q.nside == 16 and q.frame == "G"
    np.testing.assert_allclose(q.dipole, p.dipole, rtol=1e-15)


def test_load_and_prepare_from_config(tmp_path):
    nside = 32
    m = dipole_sky(nside) * 1e-6                       # written in K
    mask16 = galactic_cut_mask(16)
    f = tmp_path / "sky.fits"
    mf = tmp_path / "mask.fits"
    write_map(f, m, column_units="K_CMB", coord="G")
    write_map(mf, mask16, column_units="", coord="G")
    cfg = config_from_dict({"map": {"path": str(f), "mask": str(mf)},
                            "prepare": {"nside": 16, "lmax": 40, "fwhm_deg": 3.0}}, source="run.yaml")
    p = load_and_prepare(cfg)
    direct = prepare_map(load_map(f, mask_path=mf), cfg.prepare)
    np.testing.assert_array_equal(p.alm, direct.alm)
    assert any("regridded" in n for n in p.notes)
    # the dipole fit in uK (K -> uK, common practice, no source) on the regridded mask (healpy.fit_dipole)
    mask32 = hp.ud_grade(mask16, nside)
    mono_ref, dip_ref = hp.fit_dipole(with_unseen(m * 1e6, mask32))
    np.testing.assert_allclose(p.dipole, [mono_ref, *dip_ref], rtol=1e-6)


def test_load_and_prepare_without_map_path():
    cfg = config_from_dict({}, source="run.yaml")
    with pytest.raises(InputError) as e:
        load_and_prepare(cfg)
    assert str(e.value).startswith("run.yaml: map.path") and "allowed:" in str(e.value)


def test_input_beam_is_taken_into_account():
    # a map already smoothed by a 2 deg Gaussian beam, prepared to 3 deg in total, equals the
    # unsmoothed map prepared to 3 deg (Gaussian beams compose: b_3 = (b_3 / b_2) b_2; healpy.gauss_beam)
    from twinring.config import PrepareSection
    from twinring.prepare import prepare_map
    from twinring.skymap import SkyMap
    import healpy as hp
    import numpy as np
    nside, lmax = 32, 64
    ell = np.arange(lmax + 1)
    rng = np.random.default_rng(3)
    alm = (rng.normal(size=hp.Alm.getsize(lmax)) + 1j * rng.normal(size=hp.Alm.getsize(lmax))) * 10
    alm[hp.Alm.getidx(lmax, ell, 0)] = alm[hp.Alm.getidx(lmax, ell, 0)].real
    raw = hp.alm2map(alm, nside, lmax=lmax)
    smoothed = hp.alm2map(hp.almxfl(alm, hp.gauss_beam(np.radians(2.0), lmax=lmax)), nside, lmax=lmax)
    ones = np.ones(raw.size)

    def sky(v):
        return SkyMap(values=v, mask=ones, nside=nside, unit_in="uK", frame=None, checksum="", notes=[])
    a = prepare_map(sky(raw), PrepareSection(nside=nside, lmax=lmax, fwhm_deg=3.0, remove_dipole=False))
    b = prepare_map(sky(smoothed), PrepareSection(nside=nside, lmax=lmax, fwhm_deg=3.0, input_fwhm_deg=2.0,
                                                  remove_dipole=False))
    np.testing.assert_allclose(b.map, a.map, atol=1e-6 * np.abs(a.map).max())
