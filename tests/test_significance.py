"""Monte Carlo p-values, the min-p look-elsewhere correction and recovery limits (twinring.significance).

References: Monte Carlo p-values (1 + #{null >= s}) / (N + 1), Davison & Hinkley 1997, Bootstrap Methods and
their Application, ch. 4, and North, Curtis & Sham 2002, Am. J. Hum. Genet. 71, 439; a family-wise correction
can only raise a p-value and a threshold (common practice, no source); exact binomial limits, Clopper & Pearson
1934, Biometrika 26, 404, through scipy.stats.beta.
"""
import numpy as np
import pytest
import scipy.stats

from twinring import calibrate as cal
from twinring import significance as sig

RADII = np.arange(10.0, 90.0, 5.0)


def null_like(rng, n, r=RADII.size):
    """Peak-like null draws: Gumbel maxima with a common per-sky component (cells correlated)."""
    common = 0.3 * rng.standard_normal((n, 1, 1))
    trend = 0.2 * np.exp(-RADII / 30.0)[None, :, None]          # larger peaks on small circles
    return 0.3 + trend + 0.04 * (rng.gumbel(size=(n, r, 2)) + common)


def test_mc_pvalue_against_scipy_percentileofscore():
    rng = np.random.default_rng(3)
    v = rng.standard_normal(37)
    for s in np.r_[rng.standard_normal(20), v[:5], 10.0]:
        k = v.size * (1 - scipy.stats.percentileofscore(v, s, kind="strict") / 100)   # #{v >= s}
        p, beyond = sig.mc_pvalue(v, s)
        assert p == pytest.approx((1 + k) / (v.size + 1))
        assert bool(beyond) == (k == 0)
    assert sig.mc_pvalue(v, 10.0)[0] == pytest.approx(1 / 38)


@pytest.mark.parametrize("n", [3, 6, 20, 100])
def test_global_never_below_local_and_nothing_below_the_floor(n):
    # a family-wise correction can only raise a p-value and a threshold (common practice, no source);
    # Monte Carlo p-values never go below 1/(N+1) (Davison & Hinkley 1997; North, Curtis & Sham 2002)
    rng = np.random.default_rng(n)
    model = cal.NullModel(RADII, null_like(rng, n))
    sky = null_like(rng, 1)[0]
    for ir in range(RADII.size):
        for f in (0, 1):
            for s in np.r_[np.linspace(0.2, 1.0, 9), sky[ir, f]]:
                pl, _ = model.p_local(ir, f, s)
                pg = model.p_global(ir, f, s)
                assert pl >= 1 / (n + 1) - 1e-12 and pg >= 1 / (n + 1) - 1e-12
                assert pg >= pl - 1e-12
    t = model.thresholds_table([0.01, 0.05, 0.2, 0.5])
    ok = np.asarray(t["usable"])
    assert np.all(np.asarray(t["s_threshold_global"])[ok] >= np.asarray(t["s_threshold"])[ok])
    assert np.all(np.isnan(np.asarray(t["s_threshold"])[~ok]))
    # usable exactly when N >= 1/a - 1 (99 simulations for 1 %)
    for a in (0.01, 0.05, 0.2, 0.5):
        assert bool(t["usable"][np.isclose(t["false_alarm"], a)][0]) == (n >= 1 / a - 1 - 1e-9)
    # a value just above a threshold reaches the rate, the threshold itself does not (it must be exceeded)
    for row in t[ok]:
        ir, f, a = model.radius_index(row["radius_deg"]), int(row["flip"]), row["false_alarm"]
        thr = row["s_threshold"]
        assert model.p_local(ir, f, thr + 1e-6)[0] <= a < model.p_local(ir, f, thr)[0]
        thg = row["s_threshold_global"]
        assert model.p_global(ir, f, thg + 1e-6) <= a < model.p_global(ir, f, thg)


def test_sims_needed_for_a_rate():
    assert sig.sims_needed(0.01) == 99 and sig.sims_needed(0.05) == 19
    assert sig.resolvable(0.01, 99) and not sig.resolvable(0.01, 98)


def test_min_p_global_is_uniform_under_the_null():
    # exchangeable null skies: the global p of each held-out sky's best cell is uniform (Kolmogorov-Smirnov,
    # scipy.stats.kstest) and its fraction below 0.1 lies in the binomial 99 % interval
    rng = np.random.default_rng(11)
    n, trials = 40, 300
    best = []
    for _ in range(trials):
        draws = null_like(rng, n + 1)
        model = cal.NullModel(RADII, draws[:n])
        sky = draws[n]
        best.append(min(model.p_global(ir, f, sky[ir, f]) for ir in range(RADII.size) for f in (0, 1)))
    best = np.asarray(best)
    assert scipy.stats.kstest(best, "uniform").pvalue > 0.01
    lo, hi = scipy.stats.binom.interval(0.99, trials, 0.1)
    assert lo <= np.sum(best <= 0.1) <= hi


def test_recovery_lower_limit_against_scipy_beta():
    # Clopper & Pearson 1934: the one-sided lower 95 % limit of k of n is beta.ppf(0.05, k, n - k + 1)
    for k, n in [(3, 3), (59, 59), (58, 58), (40, 50), (0, 10)]:
        ref = scipy.stats.beta.ppf(0.05, k, n - k + 1) if k else 0.0
        assert sig.lower_limit(k, n) == pytest.approx(ref)
    assert sig.lower_limit(59, 59) >= 0.95 > sig.lower_limit(58, 58)
    assert sig.lower_limit(3, 3) < 0.95
    assert sig.all_recovered_needed(0.95) == 59
