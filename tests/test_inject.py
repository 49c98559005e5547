"""Injection-recovery campaigns on small skies (Nside 32, lmax 64, 4 deg beam, nside_centers 16)."""
from __future__ import annotations

import dataclasses
import math

import numpy as np
import healpy as hp
import pytest
import scipy.stats

from twinring import calibrate as cal
from twinring import inject, prepare
from twinring.config import InputError, config_from_dict
from twinring.skymap import SkyMap
from twinring.topology import skies

NSIDE, LMAX = 32, 64


def campaign_cfg(**inj):
    return config_from_dict({
        "prepare": {"nside": NSIDE, "lmax": LMAX, "fwhm_deg": 4.0},
        "search": {"nside_centers": 16, "radius_deg": [20, 80, 10], "refine": False},
        "calibrate": {"simulations": 40},
        # the machinery is checked on Sachs-Wolfe skies, where circles match exactly (CSS 1998)
        "inject": dict({"radii_deg": [40.0, 60.0], "realizations": 3, "noise_uk_arcmin": 500.0, "physics": "sw"},
                       **inj),
        "compute": {"progress": False},
    })


@pytest.fixture(scope="module")
def setup():
    """A full-sky 'data' map (an isotropic-looking sky: a cubic torus larger than the sphere) and its calibration."""
    cfg = campaign_cfg()
    shape = inject.shape_from_config(cfg)
    alm = skies.sky_alm(shape.at(2.2), skies.SkyRecipe(nside=NSIDE, lmax=LMAX), rng=np.random.default_rng(0))
    m = hp.alm2map(alm, NSIDE, lmax=LMAX)
    sky = SkyMap(values=m, mask=np.ones_like(m), nside=NSIDE, unit_in="uK", frame=None, checksum="")
    prepared = prepare.prepare_map(sky, cfg.prepare)
    ctx = cal.make_context(cfg, sky, prepared)
    model = cal.NullModel(np.asarray(cfg.search.radii_deg()), cal.run_simulations(ctx, 30))
    return cfg, shape, sky, model


def test_sizes_give_the_requested_radii():
    # CSS 1998: the faces of a cubic torus of side L show back-to-back circles with cos(alpha) = L / (2 chi)
    cfg = campaign_cfg(radii_deg=[25.0, 40.0, 70.0])
    shape = inject.shape_from_config(cfg)
    sizes, d1 = inject.campaign_sizes(cfg, shape, cfg.search)
    assert d1 == pytest.approx(1.0)
    assert sizes == pytest.approx([2 * math.cos(math.radians(a)) for a in (25.0, 40.0, 70.0)])
    for size, a in zip(sizes, (25.0, 40.0, 70.0)):
        radius, pairs = inject.targets(shape.at(size, inject.random_euler(np.random.default_rng(1))), cfg.search)
        assert radius == pytest.approx(a, abs=1e-6)
        assert len(pairs) == 3                       # three face pairs
        assert all(p["flip"] for p in pairs)         # translations: opposite senses (Weeks, The Shape of Space)


def test_visible_pairs_follow_the_search_family():
    # away from the screw axis of a half-turn space, some pairs are not back-to-back (Riazuelo et al. 2004,
    # PRD 69, 103518); the antipodal search cannot see them, the general one can
    cfg = config_from_dict({"topology": {"space": "E2", "lengths": [0.9, 0.9, 0.7], "observer": [0.3, 0.2, 0.0]}})
    from twinring.topology.circles import predict_pairs

    space = inject.shape_from_config(cfg).at(0.9)
    pairs = predict_pairs(space, max_distance=2.0 - 1e-9)
    anti = inject.visible(pairs, cfg.search)
    gen = inject.visible(pairs, dataclasses.replace(cfg.search, family="general"))
    assert 0 < len(anti) < len(pairs)
    assert all(p["separation_deg"] >= 179.5 for p in anti)
    assert len(gen) > len(anti)


def test_binomial_interval_is_clopper_pearson():
    # Clopper & Pearson 1934 (Biometrika 26, 404): beta quantiles
    for k, n in ((0, 5), (3, 5), (5, 5), (17, 40)):
        lo, hi = inject.binomial_interval(k, n, 0.95)
        ref_lo = scipy.stats.beta.ppf(0.025, k, n - k + 1) if k > 0 else 0.0
        ref_hi = scipy.stats.beta.ppf(0.975, k + 1, n - k) if k < n else 1.0
        assert lo == pytest.approx(ref_lo, abs=1e-9) and hi == pytest.approx(ref_hi, abs=1e-9)


def test_recovery_table_counts():
    rows = [dict(size_index=i, realization=j, size_chi=1.0 + i, radius_deg=60.0 - 20 * i, n_targets=3, flip=True,
                 s=0.9, s_threshold=0.7, radius_found_deg=60.0 - 20 * i, in_range=True, detected=(j < 2 - i))
            for i in range(2) for j in range(4)]
    rec = inject.recovery_table(inject.injections_table(rows))
    assert list(rec["radius_deg"]) == [40.0, 60.0]          # sorted by radius
    assert list(rec["detected"]) == [1, 2] and list(rec["n"]) == [4, 4]
    assert list(rec["fraction"]) == [0.25, 0.5]


def test_targeted_campaign_recovers_strong_circles(setup):
    cfg, shape, sky, model = setup
    ctx = inject.make_context(cfg, sky, model, shape)
    res = [inject.inject_unit(ctx, (i, j)) for i in range(2) for j in range(3)]
    assert all(r["in_range"] and r["detected"] for r in res), res
    assert all(abs(r["radius_found_deg"] - r["radius_deg"]) <= cfg.inject.radius_tol_deg for r in res)
    # the same unit id gives the same sky and the same verdict; another realisation another sky
    again = inject.inject_unit(ctx, (0, 1))
    assert again == res[1]
    _, sky_a = inject.injected_sky(ctx, 0, 0)
    _, sky_b = inject.injected_sky(ctx, 0, 1)
    assert not np.allclose(sky_a.values, sky_b.values)


def test_sense_matters(setup):
    # a translation pairs its circles with opposite senses (Weeks); the other sense does not match
    cfg, shape, sky, model = setup
    ctx = inject.make_context(cfg, sky, model, shape)
    space, s = inject.injected_sky(ctx, 1, 0)
    radius, pairs = inject.targets(space, cfg.search)
    prepared = prepare.prepare_map(s, cfg.prepare)
    right = inject.judge_targeted(ctx, prepared, pairs, radius, key="sense-right")
    wrong = inject.judge_targeted(ctx, prepared, [dict(p, flip=not p["flip"]) for p in pairs], radius,
                                  key="sense-wrong")
    assert right[0] >= right[1] > wrong[0]


def test_noise_defeats_recovery(setup):
    # the same campaign drowned in white noise (about 40 times the signal per pixel) recovers nothing
    cfg, shape, sky, model = setup
    noisy = campaign_cfg(noise_uk_arcmin=2e5)
    ctx = inject.make_context(noisy, sky, model, shape)
    res = [inject.inject_unit(ctx, (i, j)) for i in range(2) for j in range(3)]
    assert sum(r["detected"] for r in res) <= 1


def test_full_search_campaign(setup):
    # the full grid search: big circles (60 deg) are recovered with their centres near the predicted ones
    cfg, shape, sky, model = setup
    full = campaign_cfg(mode="full", radii_deg=[60.0])
    ctx = inject.make_context(full, sky, model, shape)
    res = [inject.inject_unit(ctx, (0, j)) for j in range(3)]
    assert sum(r["detected"] for r in res) >= 2, res
    for r in res:
        assert r["in_range"]
        if r["detected"]:
            assert abs(r["radius_found_deg"] - 60.0) <= full.inject.radius_tol_deg


def test_defaults_are_full_physics_and_a_resolved_rate(setup):
    # the Doppler and ISW terms differ between the two views of a circle (common practice, no source): campaigns
    # default to CAMB's full transfer functions, and the threshold rate must be one the simulations resolve
    cfg, shape, sky, model = setup
    assert config_from_dict({}).inject.physics == "full"
    assert inject.injection_rate(cfg, model) == cfg.calibrate.significance
    strict = campaign_cfg(false_alarm=0.01)                      # 30 simulations cannot resolve 1 %
    with pytest.raises(InputError, match="inject.false_alarm.*needs at least 99"):
        inject.injection_rate(strict, model)
    assert "Sachs-Wolfe only" in inject.physics_label("sw") and "ISW" in inject.physics_label("full")


def test_campaign_without_visible_circles_is_refused():
    # CSS 1998: a cubic torus of side L >= 2 chi shows no circle; L = 2 cos 85 deg gives 85 deg circles,
    # outside a 20-80 deg search
    for sizes, what in (([2.5], "no circle"), ([2 * math.cos(math.radians(85.0))], "radius 85.0 deg")):
        cfg = campaign_cfg(sizes=sizes)
        with pytest.raises(InputError, match=f"inject.sizes: .*{what}"):
            inject.campaign_sizes(cfg, inject.shape_from_config(cfg), cfg.search)


def test_instrument_defaults():
    synthetic = config_from_dict({"sky": {"nside": 32, "lmax": 64, "fwhm_deg": 2.0, "noise_uk_arcmin": 30.0}})
    assert inject.instrument(synthetic) == (30.0, 2.0)
    data = config_from_dict({"inject": {"noise_uk_arcmin": 10.0}})
    assert inject.instrument(data) == (10.0, 0.0)
