"""Throughput of the pair kernel against a bare batched real FFT of the same length.

A *pair-scan* is one circle pair in one sense at all N twists: the weighted
cross-spectrum, one inverse real FFT of length N, and the best twist.  The
kernel (statistic.scan_pairs) does both senses, so it performs two pair-scans
per pair.  The reference is scipy.fft.irfft on a (batch, N/2 + 1) complex64
array, rows per second, on the same machine, in the same process, with the
same number of threads.

Prints figures and, as its last line, ``kernel/fft ratio: X``.
"""
from __future__ import annotations

import argparse
import os
import time

import numpy as np
import scipy.fft

from twinring.statistic import ring_spectra, scan_pairs, SUB_BATCH


def best_of(fn, repeat):
    best = np.inf
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--nsamp", type=int, default=240, help="samples per ring (240: radius 53 deg at lmax 128)")
    ap.add_argument("--rings", type=int, default=12288, help="rings (centres) in the set")
    ap.add_argument("--pairs", type=int, default=400_000, help="pairs per timed kernel call")
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()

    rng = np.random.default_rng(0)
    n = args.nsamp
    rings = rng.normal(size=(args.rings, n))
    spec = ring_spectra(rings, None, "m")
    # pairs laid out as the general family makes them: a first ring against a run of partners
    per = args.rings // 2
    firsts = rng.integers(0, args.rings - per, args.pairs // per + 1)
    i = np.repeat(firsts, per)[: args.pairs]
    j = (i + 1 + np.tile(np.arange(per), firsts.size)[: args.pairs]) % args.rings

    t_kernel = best_of(lambda: scan_pairs(spec, i, spec, j, workers=args.threads), args.repeat)
    scans_per_s = 2 * args.pairs / t_kernel

    x = spec.b[:SUB_BATCH].copy()
    nbatch = max(1, args.pairs // SUB_BATCH)
    def bare():
        for _ in range(2 * nbatch):
            scipy.fft.irfft(x, n=n, axis=-1, workers=args.threads)
    t_fft = best_of(bare, args.repeat)
    fft_rows_per_s = 2 * nbatch * SUB_BATCH / t_fft

    print(f"machine: {os.cpu_count()} cores; threads used: {args.threads}")
    print(f"ring length N = {n}, ring set {args.rings}, pairs per call {args.pairs:,}, batch {SUB_BATCH}")
    print(f"kernel: {t_kernel:.3f} s for {args.pairs:,} pairs x 2 senses = {scans_per_s:,.0f} pair-scans/s")
    print(f"bare batched irfft (complex64, length {n}): {fft_rows_per_s:,.0f} rows/s")
    print(f"kernel/fft ratio: {scans_per_s / fft_rows_per_s:.2f}")


if __name__ == "__main__":
    main()
