"""The S statistic of matched circles, for every twist at once, both senses.

For rings T1, T2 sampled at N equal phases with Fourier coefficients a_m
(numpy's rfft), Cornish, Spergel & Starkman (1998) define

    S(beta) = 2 <T1(phi) T2(phi + beta)> / <T1^2 + T2^2>

and Cornish, Spergel, Starkman & Komatsu (2004) weight the Fourier form by |m|:

    S(beta) = 2 Re sum_m w_m conj(a1_m) a2_m e^{i m beta} / sum_m w_m (|a1_m|^2 + |a2_m|^2),

m >= 1, w_m = |m| (``weighting='m'``), 1 (``'flat'``) or the optimal filter's weights per mode
(an array; twinring.filters.optimal_ring_weights).  One inverse real FFT of
w conj(a1) a2 gives all N twists.  The opposite sense (circle 2 traversed the
other way, T1(phi) against T2(beta - phi)) uses w a1 a2 instead.  Twist index k
means beta = 2 pi k / N.

Masked rings (weights u in {0, 1}) restrict every sum to samples valid on both
circles, as circular cross-correlations (three FFT products per pair and
sense).  The |m| weighting is then applied as a filter to each ring *before*
masking: the ring (less its mean over valid samples, masked samples set to 0)
is multiplied in Fourier space by sqrt(|m|).  With u = 1 everywhere the masked
form equals the unmasked one exactly.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft

SUB_BATCH = 1024   # pairs per FFT batch: fixed so results never depend on chunking


def m_weights(nsamp, weighting):
    """Weights w_m, m = 0..nsamp // 2: ``'m'`` (|m|), ``'flat'`` (1) or an array of weights per mode
    (the optimal filter's, twinring.filters.weights_at; zero-padded or cut to length)."""
    m = np.arange(nsamp // 2 + 1, dtype=np.float64)
    if isinstance(weighting, np.ndarray):
        w = np.zeros_like(m)
        k = min(w.size, weighting.size)
        w[:k] = weighting[:k]
        if np.any(w < 0):
            raise ValueError("ring weights must be >= 0")
    else:
        w = np.abs(m) if weighting == "m" else np.ones_like(m)
    w[0] = 0.0
    if nsamp % 2 == 0:
        w[-1] = 0.0   # the Nyquist term of a band-limited ring carries nothing
    return w


@dataclass(frozen=True)
class RingSpectra:
    """Everything the pair kernel needs about a set of rings at one radius.

    ``b``: sqrt(w)-weighted Fourier coefficients (complex64, m = 0 and Nyquist zeroed);
    ``norm``: sum_m |b_m|^2 per ring; ``full``: True where every sample is valid.
    For rings with masked samples, ``f1, f2, f3`` are the rffts of u T, u T^2, u
    (T the filtered ring) and ``valid`` the count of valid samples.
    """
    nsamp: int
    b: np.ndarray
    norm: np.ndarray
    full: np.ndarray
    f1: np.ndarray | None = None
    f2: np.ndarray | None = None
    f3: np.ndarray | None = None


def ring_spectra(values, weights=None, weighting="m") -> RingSpectra:
    """Prepare rings (n, N) with optional mask weights (n, N) for the pair kernel."""
    values = np.asarray(values, dtype=np.float64)
    n, nsamp = values.shape
    w = m_weights(nsamp, weighting)
    sw = np.sqrt(w)
    if weights is None:
        full = np.ones(n, dtype=bool)
        a = scipy.fft.rfft(values, axis=-1)
        b = (a * sw).astype(np.complex64)
        norm = np.sum(np.abs(b.astype(np.complex128)) ** 2, axis=-1)
        return RingSpectra(nsamp, b, norm, full)
    u = (np.asarray(weights) > 0.5).astype(np.float64)
    full = u.all(axis=-1)
    cnt = u.sum(axis=-1)
    mean = np.where(cnt > 0, (values * u).sum(-1) / np.maximum(cnt, 1), 0.0)
    t = (values - mean[:, None]) * u
    filtered = scipy.fft.irfft(scipy.fft.rfft(t, axis=-1) * sw, n=nsamp, axis=-1)
    b = scipy.fft.rfft(filtered, axis=-1).astype(np.complex64)
    norm = np.sum(np.abs(b.astype(np.complex128)) ** 2, axis=-1)
    part = ~full
    f1 = f2 = f3 = None
    if part.any():
        tu = filtered * u
        f1 = scipy.fft.rfft(tu, axis=-1).astype(np.complex64)
        f2 = scipy.fft.rfft(tu * filtered, axis=-1).astype(np.complex64)
        f3 = scipy.fft.rfft(u, axis=-1).astype(np.complex64)
    return RingSpectra(nsamp, b, norm, full, f1, f2, f3)


def _irfft(x, nsamp, workers):
    return scipy.fft.irfft(x, n=nsamp, axis=-1, workers=workers)


def _best(corr):
    k = np.argmax(corr, axis=-1)
    return np.take_along_axis(corr, k[:, None], axis=-1)[:, 0], k


def scan_pairs(r1: RingSpectra, i1, r2: RingSpectra, i2, min_valid_fraction=0.5, workers=1):
    """Best S over twist for pairs (r1[i1[p]], r2[i2[p]]), both senses.

    Returns ``(s, k)``, each of shape (2, npairs): row 0 is ``flip = False``, row 1
    ``flip = True``; ``k`` is the twist index (beta = 2 pi k / N).  Pairs with too
    few samples valid on both circles get s = -inf.
    """
    i1 = np.asarray(i1, dtype=np.intp)
    i2 = np.asarray(i2, dtype=np.intp)
    nsamp = r1.nsamp
    npairs = i1.size
    s = np.full((2, npairs), -np.inf, dtype=np.float64)
    k = np.zeros((2, npairs), dtype=np.int64)
    both_full = r1.full[i1] & r2.full[i2]
    fast = np.flatnonzero(both_full)
    slow = np.flatnonzero(~both_full)
    rows = np.arange(SUB_BATCH)
    for lo in range(0, fast.size, SUB_BATCH):
        sel = fast[lo:lo + SUB_BATCH]
        a, c = i1[sel], i2[sel]
        b1 = np.take(r1.b, a, axis=0)
        b2 = np.take(r2.b, c, axis=0)
        den = (r1.norm[a] + r2.norm[c]) / nsamp
        den[den <= 0] = np.inf
        x = np.multiply(b1, b2)                      # flip = True: a1 a2
        np.conjugate(b1, out=b1)
        for sense, prod in ((1, x), (0, np.multiply(b1, b2, out=b2))):   # flip = False: conj(a1) a2
            corr = _irfft(prod, nsamp, workers)
            kk = np.argmax(corr, axis=-1)
            s[sense, sel] = corr[rows[: sel.size], kk] / den
            k[sense, sel] = kk
    if slow.size:
        _scan_masked(r1, i1, r2, i2, slow, s, k, min_valid_fraction, workers)
    return s, k


def _spec(r: RingSpectra, which, idx):
    """Masked-form spectra for rings idx; fully valid rings are filled in from b."""
    if r.f1 is None:
        r_f = None
    else:
        r_f = getattr(r, which)
    nsamp = r.nsamp
    out = np.empty((idx.size, nsamp // 2 + 1), dtype=np.complex64)
    full = r.full[idx]
    if full.any():
        fi = idx[full]
        if which == "f1":
            out[full] = r.b[fi]
        elif which == "f2":
            t = scipy.fft.irfft(r.b[fi], n=nsamp, axis=-1)
            out[full] = scipy.fft.rfft(t * t, axis=-1)
        else:
            out[full] = 0
            out[full, 0] = nsamp
    if (~full).any():
        out[~full] = r_f[idx[~full]]
    return out


def _scan_masked(r1, i1, r2, i2, sel_all, s, k, min_valid_fraction, workers):
    nsamp = r1.nsamp
    need = min_valid_fraction * nsamp
    for lo in range(0, sel_all.size, SUB_BATCH):
        sel = sel_all[lo:lo + SUB_BATCH]
        a, b = i1[sel], i2[sel]
        f1a, f2a, f3a = (_spec(r1, w, a) for w in ("f1", "f2", "f3"))
        f1b, f2b, f3b = (_spec(r2, w, b) for w in ("f1", "f2", "f3"))
        for sense in (0, 1):
            cj = np.conj if sense == 0 else (lambda z: z)
            num = 2 * _irfft(cj(f1a) * f1b, nsamp, workers)
            den = _irfft(cj(f2a) * f3b + cj(f3a) * f2b, nsamp, workers)
            cnt = _irfft(cj(f3a) * f3b, nsamp, workers)
            ok = (cnt >= need - 0.5) & (den > 0)
            val = np.where(ok, num / np.where(ok, den, 1.0), -np.inf)
            best, kk = _best(val)
            s[sense, sel] = best
            k[sense, sel] = kk


def s_curve(t1, t2, flip, weighting="m", u1=None, u2=None, oversample=1):
    """S(beta) for one pair of rings on ``N * oversample`` twists (reference-quality, for refinement).

    Without masks the Fourier form is evaluated with a zero-padded inverse FFT,
    so it is exact at the finer twists (S is a trigonometric polynomial).
    """
    t1 = np.asarray(t1, float)
    t2 = np.asarray(t2, float)
    nsamp = t1.size
    if u1 is None and u2 is None:
        w = m_weights(nsamp, weighting)
        a1 = scipy.fft.rfft(t1)
        a2 = scipy.fft.rfft(t2)
        x = w * (a1 if flip else np.conj(a1)) * a2
        den = np.sum(w * (np.abs(a1) ** 2 + np.abs(a2) ** 2))
        n_out = nsamp * oversample
        xp = np.zeros(n_out // 2 + 1, dtype=complex)
        xp[: x.size] = x
        if nsamp % 2 == 0:
            xp[nsamp // 2] = 0
        return 2 * np.real(scipy.fft.irfft(xp, n=n_out) * n_out / 2) / den
    r1 = ring_spectra(t1[None], None if u1 is None else u1[None], weighting)
    r2 = ring_spectra(t2[None], None if u2 is None else u2[None], weighting)
    a = np.array([0])
    out = np.empty(nsamp)
    sense = 1 if flip else 0
    f1a, f2a, f3a = (_spec(r1, w, a) for w in ("f1", "f2", "f3"))
    f1b, f2b, f3b = (_spec(r2, w, a) for w in ("f1", "f2", "f3"))
    cj = np.conj if sense == 0 else (lambda z: z)
    num = 2 * scipy.fft.irfft(cj(f1a) * f1b, n=nsamp)
    den = scipy.fft.irfft(cj(f2a) * f3b + cj(f3a) * f2b, n=nsamp)
    out[:] = np.where(den > 0, num / np.where(den > 0, den, 1), -np.inf)[0]
    return out
