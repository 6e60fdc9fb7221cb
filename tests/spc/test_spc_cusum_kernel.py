"""The blockwise CUSUM kernel against the per-point loop on mixes of series lengths.

Values are multiples of 1/8 and k, h, headstart multiples of 1/4, so every sum is exact in floating point
and the vectorised sums must equal the loop's whatever the order of additions.
"""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from spc_oracles import cusum_loop

from spc.cusum import CusumParams, evaluate_cusum


def _frame(lengths, seed):
    rng = np.random.default_rng(seed)
    lengths = np.asarray(lengths)
    b = np.repeat(np.arange(lengths.size), lengths)
    first = np.repeat(np.cumsum(lengths) - lengths, lengths)
    pos = np.arange(b.size) - first
    # a shift after point 100 makes long series signal (and restart) many times
    value = rng.integers(-24, 25, size=b.size) / 8 + (pos > 100) * 1.25
    return pl.DataFrame(
        {
            "series": pl.Series([f"C{i:04d}" for i in range(lengths.size)]).gather(b),
            "seq": pos + 1,
            "value": value,
            "center": 0.0,
            "sigma": 1.0,
        }
    )


CASES = {
    "one-point and short series": [1, 1, 2, 3, *np.random.default_rng(4).integers(1, 11, size=500).tolist()],
    "equal series": [300] * 40,
    "long, short and one-point series": [9000, 5000, *[7] * 300, 1, 4500],
}


@pytest.mark.parametrize("reset", [True, False])
@pytest.mark.parametrize("case", list(CASES))
def test_cusum_equals_per_point_loop_on_mixed_lengths(case, reset):
    pts = _frame(CASES[case], seed=len(case))
    p = CusumParams(k=0.5, h=4.0, headstart=1.25 if reset else 0.0, reset=reset)
    r = evaluate_cusum(pts, p)
    hi, lo, sig = [], [], []
    for _, g in pts.group_by("series", maintain_order=True):
        ref = cusum_loop(g["value"].to_list(), p.k, p.h, p.headstart, p.reset)
        hi += [t[0] for t in ref]
        lo += [t[1] for t in ref]
        sig += [t[2] for t in ref]
    assert r.points["cusum_hi"].to_list() == hi
    assert r.points["cusum_lo"].to_list() == lo
    got = r.signals.select("series", "seq").unique(maintain_order=True).rows()
    assert got == [row for row, s in zip(pts.select("series", "seq").rows(), sig, strict=True) if s]
    if case != "one-point and short series":
        assert sum(sig) > 100
