"""spc.shape: step-vs-ramp fits against numpy least squares and a brute-force change-point loop."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from spc.shape import compare_step_and_ramp


def _oracle_step(y: np.ndarray, m: int) -> tuple[int, float, float]:
    best = None
    for k in range(m, y.size - m + 1):  # split after position k
        rss = ((y[:k] - y[:k].mean()) ** 2).sum() + ((y[k:] - y[k:].mean()) ** 2).sum()
        if best is None or rss < best[1] - 1e-12:
            best = (k, rss, y[k:].mean() - y[:k].mean())
    return best


def test_compare_step_and_ramp_matches_numpy_line_and_loop_change_point():
    rng = np.random.default_rng(11)
    frames, ys = [], {}
    for tool, kind in (("A", "ramp"), ("B", "step"), ("C", "flat")):
        x = np.arange(30.0)
        y = {"ramp": 0.05 * x, "step": np.where(x >= 12, 1.0, 0.0), "flat": 0.0 * x}[kind] + rng.normal(
            0, 0.1, 30
        )
        ys[tool] = y
        frames.append(pl.DataFrame({"tool": tool, "seq": x, "value": y}))
    out = compare_step_and_ramp(pl.concat(frames)).sort("tool")
    for r in out.iter_rows(named=True):
        y = ys[r["tool"]]
        b, a = np.polyfit(np.arange(30.0), y, 1)  # numpy least squares (reference library)
        assert r["slope"] == pytest.approx(b, rel=1e-9)
        assert r["rss_ramp"] == pytest.approx(((y - a - b * np.arange(30.0)) ** 2).sum(), rel=1e-7)
        k, rss, size = _oracle_step(y, 3)
        assert r["step_after"] == k and r["rss_step"] == pytest.approx(rss, rel=1e-7)
        assert r["step_size"] == pytest.approx(size, rel=1e-9)
        bic = lambda rss, p: 30 * np.log(rss / 30) + p * np.log(30)  # noqa: E731 (Schwarz 1978)
        assert r["shape"] == ("step" if bic(r["rss_step"], 3) < bic(r["rss_ramp"], 2) else "ramp")
        flat = ((y - y.mean()) ** 2).sum()  # the constant model: deviations from numpy's mean
        assert r["rss_flat"] == pytest.approx(flat, rel=1e-9)
        assert r["bic_flat"] == pytest.approx(bic(flat, 1), rel=1e-9)
        assert r["changed"] == (min(bic(r["rss_step"], 3), bic(r["rss_ramp"], 2)) < bic(flat, 1))
    assert out.filter(pl.col("tool") == "A")["shape"].item() == "ramp"
    # noise about a constant level is no change, whichever of step and ramp fits it a little better
    assert out["changed"].to_list() == [True, True, False]
    assert out.filter(pl.col("tool") == "B")["shape"].item() == "step"
    assert out.filter(pl.col("tool") == "B")["step_after"].item() == 12


def test_compare_step_and_ramp_short_series_has_no_shape():
    f = pl.DataFrame({"tool": "A", "seq": [1, 2, 3, 4, 5], "value": [1.0, 2.0, 1.0, 2.0, 1.0]})
    assert compare_step_and_ramp(f)["shape"].item() is None
