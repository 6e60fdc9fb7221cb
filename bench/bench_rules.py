"""Rules benchmark: all Western Electric and Nelson rules plus EWMA and CUSUM over many series.

Compares lotline's `spc.signals.evaluate_signals` with, on the same data and in the same run,
(1) a naive per-point Python loop over a pandas group-by (timed on a subset of whole series and scaled to
the full size) and (2) a straightforward vectorised NumPy implementation that loops over series and uses
sliding windows, `scipy.signal.lfilter` and cumulative sums per series (also timed on a subset and scaled).
Targets: >= 50x the naive loop, no slower than the straightforward NumPy version, peak memory <= 3 GB.

Run: ``python -m bench.bench_rules [--quick]``; a harness calls ``run(size)``.
"""

from __future__ import annotations

import argparse
import resource
import time

import numpy as np
import polars as pl
from numpy.lib.stride_tricks import sliding_window_view
from scipy.signal import lfilter

from spc.cusum import CusumParams
from spc.ewma import EwmaParams
from spc.rules import NELSON, WESTERN_ELECTRIC
from spc.signals import evaluate_signals

RULE_IDS = list(WESTERN_ELECTRIC + NELSON)
EWMA_P = EwmaParams(lam=0.2, L=3.0)
CUSUM_P = CusumParams(k=0.5, h=5.0)
POINTS_PER_SERIES = 1000


def make_points(size: int, seed: int = 0) -> pl.DataFrame:
    n_series = max(1, size // POINTS_PER_SERIES)
    length = size // n_series
    rng = np.random.default_rng(seed)
    names = pl.Series([f"S{i:06d}" for i in range(n_series)])
    return pl.DataFrame(
        {
            "series": names.gather(np.repeat(np.arange(n_series), length)),
            "seq": np.tile(np.arange(1, length + 1, dtype=np.int64), n_series),
            "value": rng.standard_normal(n_series * length) * 2.0 + 10.0,
            "center": 10.0,
            "sigma": 2.0,
        }
    )


# ----------------------------------------------------------------- naive per-point loop (pandas group-by)


def naive_loop(points) -> int:
    df = points.to_pandas()
    count = 0
    for _, g in df.groupby("series", sort=False):
        x = g["value"].to_numpy().tolist()
        c, s = float(g["center"].iloc[0]), float(g["sigma"].iloc[0])
        zs = [(v - c) / s for v in x]
        w, hi, lo = 0.0, 0.0, 0.0
        for i in range(len(zs)):
            z = zs[i]
            count += abs(z) > 3  # we1, nelson1
            count += abs(z) > 3
            for m, win, k in ((2, 3, 2.0), (4, 5, 1.0)):  # we2/nelson5, we3/nelson6
                seg = zs[max(0, i - win + 1) : i + 1]
                hit = (z > k and sum(v > k for v in seg) >= m) or (z < -k and sum(v < -k for v in seg) >= m)
                count += 2 * hit
            for L in (8, 9):  # we4, nelson2
                seg = zs[i - L + 1 : i + 1] if i >= L - 1 else []
                count += bool(seg) and (all(v > 0 for v in seg) or all(v < 0 for v in seg))
            if i >= 5:  # nelson3
                seg = x[i - 5 : i + 1]
                count += all(b > a for a, b in zip(seg, seg[1:], strict=False)) or all(
                    b < a for a, b in zip(seg, seg[1:], strict=False)
                )
            if i >= 13:  # nelson4
                seg = x[i - 13 : i + 1]
                d = [b - a for a, b in zip(seg, seg[1:], strict=False)]
                count += all(p * q < 0 for p, q in zip(d, d[1:], strict=False))
            if i >= 14:  # nelson7
                count += all(abs(v) < 1 for v in zs[i - 14 : i + 1])
            if i >= 7:  # nelson8
                count += all(abs(v) > 1 for v in zs[i - 7 : i + 1])
            w = w + EWMA_P.lam * (z - w)
            lim = EWMA_P.L * (EWMA_P.lam / (2 - EWMA_P.lam) * (1 - (1 - EWMA_P.lam) ** (2 * (i + 1)))) ** 0.5
            count += abs(w) > lim
            hi = max(0.0, hi + z - CUSUM_P.k)
            lo = max(0.0, lo - z - CUSUM_P.k)
            if hi > CUSUM_P.h or lo > CUSUM_P.h:
                count += (hi > CUSUM_P.h) + (lo > CUSUM_P.h)
                hi = lo = 0.0
    return int(count)


# ----------------------------------------------------------------- straightforward vectorised NumPy


def _runs(cond: np.ndarray, length: int) -> np.ndarray:
    out = np.zeros(cond.size, dtype=bool)
    if cond.size >= length:
        out[length - 1 :] = sliding_window_view(cond, length).all(axis=1)
    return out


def _count(cond: np.ndarray, width: int) -> np.ndarray:
    c = np.convolve(cond.astype(np.int64), np.ones(width, dtype=np.int64))[: cond.size]
    return c


def numpy_per_series(points) -> int:
    value = points["value"].to_numpy()
    z_all = (value - points["center"].to_numpy()) / points["sigma"].to_numpy()
    bounds = np.flatnonzero(np.diff(points["series"].rle_id().to_numpy())) + 1
    count = 0
    for z, x in zip(np.split(z_all, bounds), np.split(value, bounds), strict=True):
        count += 2 * int(np.sum(np.abs(z) > 3))
        for m, win, k in ((2, 3, 2.0), (4, 5, 1.0)):
            up, dn = z > k, z < -k
            count += 2 * int(np.sum((up & (_count(up, win) >= m)) | (dn & (_count(dn, win) >= m))))
        for L in (8, 9):
            count += int(np.sum(_runs(z > 0, L) | _runs(z < 0, L)))
        d = np.diff(x, prepend=x[0])
        d[0] = 0
        count += int(np.sum(_runs(d > 0, 5) | _runs(d < 0, 5)))
        alt = np.zeros(z.size, dtype=bool)
        alt[2:] = d[2:] * d[1:-1] < 0
        count += int(np.sum(_runs(alt, 12)))
        count += int(np.sum(_runs(np.abs(z) < 1, 15))) + int(np.sum(_runs(np.abs(z) > 1, 8)))
        lam = EWMA_P.lam
        w = lfilter([lam], [1, -(1 - lam)], z)
        t = np.arange(1, z.size + 1)
        count += int(np.sum(np.abs(w) > EWMA_P.L * np.sqrt(lam / (2 - lam) * (1 - (1 - lam) ** (2 * t)))))
        start = 0
        while start < z.size:  # CUSUM: cumulative sums from each restart to the next signal
            seg = z[start:]
            dh = np.cumsum(seg - CUSUM_P.k)
            sh = dh - np.minimum(0, np.minimum.accumulate(dh))
            dl = np.cumsum(-seg - CUSUM_P.k)
            sl = dl - np.minimum(0, np.minimum.accumulate(dl))
            sig = np.flatnonzero((sh > CUSUM_P.h) | (sl > CUSUM_P.h))
            if not sig.size:
                break
            j = sig[0]
            count += int(sh[j] > CUSUM_P.h) + int(sl[j] > CUSUM_P.h)
            start += j + 1
    return count


def lotline(points) -> int:
    return evaluate_signals(points, RULE_IDS, ewma=EWMA_P, cusum=CUSUM_P).height


REPEATS = 3
"""Each implementation runs this many times; the fastest run counts (the usual guard against noise)."""


def _timed(fn, arg):
    best, out = float("inf"), None
    for _ in range(REPEATS):
        t0 = time.perf_counter()
        out = fn(arg)
        best = min(best, time.perf_counter() - t0)
    return best, out


def run(size: int) -> list[dict]:
    """Time lotline against both baselines on `size` points; one result dict per comparison."""
    points = make_points(size)
    n_series = points["series"].n_unique()
    warm = points.head(2 * POINTS_PER_SERIES)
    for fn in (lotline, numpy_per_series, naive_loop):  # first calls import pandas etc.: not the loops' cost
        fn(warm)
    t_lot, n_lot = _timed(lotline, points)
    rss_gb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024**2

    sub_series = max(1, min(n_series, 1000))
    subset = points.head(sub_series * POINTS_PER_SERIES)
    t_np, n_np = _timed(numpy_per_series, subset)
    t_np *= points.height / subset.height
    naive_series = max(1, min(n_series, 20))
    small = points.head(naive_series * POINTS_PER_SERIES)
    t_naive, n_naive = _timed(naive_loop, small)
    t_naive *= points.height / small.height
    n_lot_small = lotline(small)
    n_lot_sub = lotline(subset)
    assert n_naive == n_lot_small, f"naive loop found {n_naive} signals, lotline {n_lot_small}"
    assert n_np == n_lot_sub, f"NumPy baseline found {n_np} signals, lotline {n_lot_sub}"
    common = {
        "size": points.height,
        "series": n_series,
        "signals": n_lot,
        "peak_rss_mb": round(rss_gb * 1024),
    }
    return [
        {
            "name": "rules+ewma+cusum vs naive loop",
            "seconds": t_lot,
            "baseline_seconds": t_naive,
            "ratio": t_naive / t_lot,
            "target": 50.0,
            "ok": t_naive / t_lot >= 50.0,
            **common,
        },
        {
            "name": "rules+ewma+cusum vs numpy per series",
            "seconds": t_lot,
            "baseline_seconds": t_np,
            "ratio": t_np / t_lot,
            "target": 1.0,
            "ok": t_np / t_lot >= 1.0,
            **common,
        },
        {
            "name": "rules+ewma+cusum peak memory (GB)",
            "seconds": t_lot,
            "baseline_seconds": None,
            "ratio": rss_gb,
            "target": 3.0,
            "ok": rss_gb <= 3.0,
            **common,
        },
    ]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="1M points instead of 10M")
    ap.add_argument("--size", type=int, default=None, help="number of points")
    args = ap.parse_args()
    size = args.size or (1_000_000 if args.quick else 10_000_000)
    rows = run(size)
    print(
        f"{'benchmark':<40} {'points':>11} {'lotline s':>10} {'baseline s':>11} {'ratio':>8} {'target':>7} ok"
    )
    for r in rows:
        base = f"{r['baseline_seconds']:.2f}" if r["baseline_seconds"] is not None else "-"
        print(
            f"{r['name']:<40} {r['size']:>11,} {r['seconds']:>10.2f} {base:>11} {r['ratio']:>8.2f} "
            f"{r['target']:>7.1f} {'yes' if r['ok'] else 'NO'}"
        )


if __name__ == "__main__":
    main()
