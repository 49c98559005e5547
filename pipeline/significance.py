"""Monte Carlo p-values, the min-p look-elsewhere correction, thresholds and intervals.

Pure functions over arrays: nothing here reads a file or knows a config.

The rules (README, "Significance"):

* **Local** (one radius and sense, a *cell*): with N simulations' peak values
  ``v_1..v_N`` at that cell, ``p_local(s) = (1 + #{v_i >= s}) / (N + 1)``
  (Davison & Hinkley 1997, *Bootstrap Methods and their Application*, ch. 4;
  North, Curtis & Sham 2002, Am. J. Hum. Genet. 71, 439). It is never below
  ``1/(N+1)``; a value beyond every simulation gets that floor and
  ``beyond_sims = True``.
* **Global** (all radii and both senses), the minimum-p method: each
  simulation j gets a local p in every cell against the *other* simulations,
  ``p_jc = (1 + #{i != j: v_ic >= v_jc}) / (N + 1)``, and its smallest one
  ``m_j = min_c p_jc`` is one draw of the null distribution of the minimum.
  Ties in ``m_j`` (many simulations are the largest of some cell once there are
  more cells than simulations) are broken by the standardised excess
  ``z = (v - mean) / std`` of the cell(s) where the minimum is reached (the
  simulation's own value left out of the mean and std). A value with local p
  ``p`` and standardised excess ``z`` then has
  ``p_global = (1 + #{j: m_j < p, or m_j = p and z_j >= z}) / (N + 1)``.
  Every simulation whose peak at the value's cell is at least the value has
  ``m_j <= k/(N+1) < p``, so ``p_global >= p_local`` always; counting the
  simulations' local p on the (N+1) scale without the data makes ``m_j`` no
  larger than in the exchangeable ranking that includes the data, so the
  global p is conservative.
* **Resolution**: a false-alarm rate ``a`` can be claimed only with
  ``N >= 1/a - 1`` simulations (99 for 1 %): below that even a value beyond
  every simulation has p = 1/(N+1) > a.
* **Thresholds**: the smallest S that a value must *exceed* to reach
  ``p <= a``; for the global threshold the smallest S at that cell whose global
  p is at most ``a``. Both come from the simulations' ranks alone.
* **Recovered fractions**: the one-sided exact lower limit of Clopper & Pearson
  (1934, Biometrika 26, 404), through ``scipy.stats.beta``.
"""
from __future__ import annotations

import math

import numpy as np
import scipy.stats

REL_EPS = 1e-7       # "just above" a value (relative) when evaluating p at a threshold
Z_TIE = 1e-9         # standardised excesses closer than this are ties (counted against the value)


def mc_pvalue(null, s):
    """Empirical upper-tail p-value of ``s`` against the finite values of ``null``.

    Parameters
    ----------
    null : array_like
        The simulations' values at one cell (NaN entries are ignored).
    s : float or array_like
        Observed value(s).

    Returns
    -------
    p : ndarray
        ``(1 + #{null >= s}) / (N + 1)`` (NaN where ``s`` is not finite or N is 0).
    beyond : ndarray of bool
        True where no simulation reaches ``s``.
    """
    v = np.sort(np.asarray(null, float)[np.isfinite(np.asarray(null, float))])
    s = np.asarray(s, float)
    n = v.size
    k = n - np.searchsorted(v, s, side="left")          # #{v >= s}
    p = (1.0 + k) / (n + 1.0)
    bad = ~np.isfinite(s) | (n == 0)
    return np.where(bad, np.nan, p), np.where(bad, False, k == 0)


def resolvable(rate, n_sims) -> bool:
    """Whether ``n_sims`` simulations can support a false-alarm rate ``rate`` (N >= 1/rate - 1)."""
    return bool(n_sims >= 1 and (n_sims + 1) * float(rate) >= 1.0 - 1e-9)


def sims_needed(rate) -> int:
    """Smallest N with ``(N + 1) * rate >= 1``."""
    return int(math.ceil(1.0 / float(rate) - 1e-9)) - 1


def leave_one_out(peaks):
    """Each simulation's local p and standardised excess in every cell, against the others.

    Parameters
    ----------
    peaks : ndarray, shape (N, C)
        Peak statistic of N simulations in C cells (NaN: no value).

    Returns
    -------
    p : ndarray (N, C)
        ``(1 + #{i != j: v_ic >= v_jc}) / (N_c + 1)``, N_c the finite values of cell c.
    z : ndarray (N, C)
        ``(v_jc - mean_-j) / std_-j`` with the mean and sample std of the others.
    """
    P = np.asarray(peaks, float)
    n, c = P.shape
    ok = np.isfinite(P)
    nc = ok.sum(axis=0)
    p = np.full(P.shape, np.nan)
    z = np.full(P.shape, np.nan)
    for j in range(c):
        col = P[ok[:, j], j]
        if col.size == 0:
            continue
        srt = np.sort(col)
        ge = col.size - np.searchsorted(srt, col, side="left")        # #{i: v_i >= v_j}, self included
        p[ok[:, j], j] = ge / (nc[j] + 1.0)                            # (1 + others) / (N_c + 1)
        m = col.size - 1
        if m >= 2:
            tot, tot2 = col.sum(), np.sum(col**2)
            mu = (tot - col) / m
            var = (tot2 - col**2 - m * mu**2) / (m - 1)
            sd = np.sqrt(np.maximum(var, 0.0))
            with np.errstate(divide="ignore", invalid="ignore"):
                z[ok[:, j], j] = np.where(sd > 0, (col - mu) / sd, np.nan)
    return p, z


def min_p_null(peaks):
    """Null draws of the minimum local p over cells, with their tie-breaking excess.

    Returns
    -------
    m : ndarray (N,)
        Each simulation's smallest leave-one-out local p.
    zt : ndarray (N,)
        The largest standardised excess among the cells where that minimum is reached.
    """
    p, z = leave_one_out(peaks)
    n = p.shape[0]
    m = np.full(n, np.nan)
    zt = np.full(n, -np.inf)
    for j in range(n):
        okj = np.isfinite(p[j])
        if not okj.any():
            continue
        m[j] = np.min(p[j, okj])
        at = okj & np.isclose(p[j], m[j], rtol=1e-12, atol=0.0)
        zz = z[j, at]
        zz = zz[np.isfinite(zz)]
        zt[j] = np.max(zz) if zz.size else -np.inf
    return m, zt


def global_pvalue(p_local, z, null_m, null_z):
    """Family-wise p of values with local p ``p_local`` and excess ``z`` (min-p method, see module doc)."""
    pl = np.atleast_1d(np.asarray(p_local, float))
    zz = np.atleast_1d(np.asarray(z, float))
    zz = np.where(np.isfinite(zz), zz, -np.inf)
    ok = np.isfinite(null_m)
    m = np.asarray(null_m, float)[ok]
    mz = np.asarray(null_z, float)[ok]
    n = m.size
    out = np.full(pl.shape, np.nan)
    for i, (p, zi) in enumerate(zip(pl, zz)):
        if not np.isfinite(p) or n == 0:
            continue
        tie = np.isclose(m, p, rtol=1e-12, atol=0.0)
        count = np.sum((m < p) & ~tie) + np.sum(tie & (mz >= zi - Z_TIE))
        out[i] = (1.0 + count) / (n + 1.0)
    return out if np.ndim(p_local) else float(out[0])


def smallest_exceeding(candidates, pfun, rate):
    """Smallest candidate x such that ``pfun`` just above x is at most ``rate`` (NaN if none).

    ``pfun`` must be non-increasing (a p-value as a function of the statistic);
    the candidates are searched by bisection.
    """
    xs = np.asarray(candidates, float)
    xs = np.unique(xs[np.isfinite(xs)])

    def ok(i):
        x = xs[i]
        return pfun(x + REL_EPS * max(1.0, abs(x))) <= rate

    if xs.size == 0 or not ok(xs.size - 1):
        return float("nan")
    lo, hi = -1, xs.size - 1            # ok(hi) holds; ok(lo) is taken false
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if ok(mid):
            hi = mid
        else:
            lo = mid
    return float(xs[hi])


def lower_limit(k, n, cl=0.95):
    """One-sided exact lower confidence limit of a binomial fraction (Clopper & Pearson 1934).

    ``beta.ppf(1 - cl, k, n - k + 1)``; 0 for k = 0. With every trial a success it is
    ``(1 - cl)**(1/n)``: 59 of 59 gives 0.9505, 3 of 3 gives 0.368.
    """
    k = np.asarray(k, float)
    n = np.asarray(n, float)
    with np.errstate(invalid="ignore", divide="ignore"):
        lo = np.where(k > 0, scipy.stats.beta.ppf(1.0 - cl, k, n - k + 1), 0.0)
    lo = np.where(n > 0, lo, np.nan)
    return float(lo) if lo.ndim == 0 else lo


def all_recovered_needed(level, cl=0.95) -> int:
    """Smallest n whose n-of-n lower limit (one-sided ``cl``) reaches ``level``: 59 for 95 % at 95 %."""
    return int(math.ceil(math.log(1.0 - cl) / math.log(level) - 1e-12))
