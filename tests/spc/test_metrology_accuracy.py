"""Accuracy: Mandel errors-in-variables fit vs scipy.odr and a direct minimisation; reference bias."""

import importlib
import warnings
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from scipy import optimize, stats

from spc.accuracy import error_variance_ratio_from_precision, evaluate_reference_bias, fit_errors_in_variables

DATA = Path(__file__).parents[1] / "data" / "tool_health"


def _photomask() -> pl.DataFrame:
    # NIST/SEMATECH e-Handbook §2.3.7.1: low / middle / high photomask standards, 6 days, µm
    return pl.read_csv(DATA / "photomask_linewidth_check_standards.csv").rename(
        {"position": "standard", "reference_um": "reference", "measured_um": "measured"}
    )


def _odr_line(x: np.ndarray, y: np.ndarray, ratio: float) -> tuple[float, float] | None:
    """Slope and intercept from scipy.odr with sx = 1, sy = sqrt(ratio); None if scipy.odr is gone."""
    with warnings.catch_warnings():
        # scipy.odr is deprecated as of scipy 1.17 (removal planned for 1.19); silence it here only
        warnings.simplefilter("ignore", DeprecationWarning)
        try:
            odr = importlib.import_module("scipy.odr")
        except ImportError:
            return None
        start = np.polyfit(x, y, 1)
        data = odr.RealData(x, y, sx=np.ones_like(x), sy=np.full_like(y, np.sqrt(ratio)))
        out = odr.ODR(data, odr.unilinear, beta0=start, sstol=1e-15, partol=1e-15, maxit=1000).run()
    return float(out.beta[0]), float(out.beta[1])


def _minimised_line(x: np.ndarray, y: np.ndarray, ratio: float) -> tuple[float, float]:
    """Direct numerical minimisation of the errors-in-variables criterion (independent of the closed form).

    With error variances ratio*s^2 (measured) and s^2 (reference), profiling out the true values
    leaves sum((y - a - b x)^2) / (ratio + b^2) to minimise over (a, b).
    """

    def loss(p: np.ndarray) -> float:
        a, b = p
        return float(np.sum((y - a - b * x) ** 2) / (ratio + b * b))

    b0, a0 = np.polyfit(x, y, 1)
    res = optimize.minimize(loss, x0=[a0, b0], method="Nelder-Mead", options={"xatol": 1e-12, "fatol": 1e-14})
    return float(res.x[1]), float(res.x[0])


def _simulated(seed: int = 1, n: int = 40) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    true = rng.uniform(20, 120, size=n)
    return pl.DataFrame(
        {
            "reference": true + rng.normal(0, 0.8, size=n),
            "measured": 1.5 + 0.97 * true + rng.normal(0, 0.5, size=n),
        }
    )


@pytest.mark.parametrize("ratio", [1.0, 0.25, 4.0])
def test_errors_in_variables_slope_offset_match_scipy_odr(ratio):
    for frame in (_simulated(), _photomask()):
        x, y = frame["reference"].to_numpy(), frame["measured"].to_numpy()
        got = fit_errors_in_variables(frame, error_variance_ratio=ratio).row(0, named=True)
        ref = _odr_line(x, y, ratio)
        if ref is None:  # scipy.odr removed: the direct minimisation below still checks the fit
            continue
        assert got["slope"] == pytest.approx(ref[0], rel=1e-7)
        assert got["offset"] == pytest.approx(ref[1], rel=1e-6, abs=1e-8)


@pytest.mark.parametrize("ratio", [1.0, 0.25, 4.0])
def test_errors_in_variables_matches_direct_minimisation(ratio):
    frame = _simulated(seed=2)
    b, a = _minimised_line(frame["reference"].to_numpy(), frame["measured"].to_numpy(), ratio)
    got = fit_errors_in_variables(frame, error_variance_ratio=ratio).row(0, named=True)
    assert got["slope"] == pytest.approx(b, rel=1e-6)
    assert got["offset"] == pytest.approx(a, rel=1e-5, abs=1e-6)


def test_errors_in_variables_large_ratio_tends_to_least_squares():
    frame = _simulated(seed=3)
    ols = stats.linregress(frame["reference"].to_numpy(), frame["measured"].to_numpy())
    got = fit_errors_in_variables(frame, error_variance_ratio=1e9).row(0, named=True)
    assert got["slope"] == pytest.approx(ols.slope, rel=1e-6)
    assert got["offset"] == pytest.approx(ols.intercept, rel=1e-5)


def test_errors_in_variables_jackknife_matches_explicit_leave_one_out():
    frame = _simulated(seed=4, n=15)
    x, y = frame["reference"].to_numpy(), frame["measured"].to_numpy()
    ratio = 0.5
    slopes, offsets = [], []
    for i in range(len(x)):
        keep = np.arange(len(x)) != i
        b, a = _minimised_line(x[keep], y[keep], ratio)
        slopes.append(b)
        offsets.append(a)
    slopes, offsets = np.array(slopes), np.array(offsets)
    n = len(x)
    se_b = np.sqrt((n - 1) / n * np.sum((slopes - slopes.mean()) ** 2))
    se_a = np.sqrt((n - 1) / n * np.sum((offsets - offsets.mean()) ** 2))
    got = fit_errors_in_variables(frame, error_variance_ratio=ratio).row(0, named=True)
    assert got["slope_se"] == pytest.approx(se_b, rel=1e-4)
    assert got["offset_se"] == pytest.approx(se_a, rel=1e-4)
    t = stats.t.ppf(0.975, n - 2)
    assert got["slope_lo"] == pytest.approx(got["slope"] - t * got["slope_se"], rel=1e-12)


def test_errors_in_variables_tmu_removes_reference_uncertainty():
    # Banke and Archie (SPIE 1999), from memory: TMU = residual error about the Mandel line with the
    # reference system's own uncertainty removed. Simulated tool error 0.4 nm, reference 0.6 nm.
    rng = np.random.default_rng(9)
    true = rng.uniform(30, 90, size=4000)
    frame = pl.DataFrame(
        {
            "reference": true + rng.normal(0, 0.6, size=true.size),
            "measured": 2.0 + true + rng.normal(0, 0.4, size=true.size),
        }
    )
    ratio = float(error_variance_ratio_from_precision(0.4, 0.6))
    got = fit_errors_in_variables(frame, error_variance_ratio=ratio, reference_sd=0.6).row(0, named=True)
    assert got["slope"] == pytest.approx(1.0, abs=0.01)
    assert got["residual_sd"] == pytest.approx(np.hypot(0.4, 0.6), rel=0.05)
    assert got["tmu_sd"] == pytest.approx(0.4, rel=0.1)
    assert got["tmu"] == pytest.approx(3 * got["tmu_sd"], rel=1e-12)


def test_errors_in_variables_by_groups_equal_separate_fits():
    a = _simulated(seed=5).with_columns(pl.lit("SEM1").alias("tool"))
    b = _simulated(seed=6).with_columns(pl.lit("SEM2").alias("tool"))
    both = fit_errors_in_variables(pl.concat([a, b]), by=["tool"]).sort("tool")
    alone = fit_errors_in_variables(b.drop("tool"))
    assert both["slope"][1] == pytest.approx(alone["slope"].item(), rel=1e-12)
    assert both["slope_se"][1] == pytest.approx(alone["slope_se"].item(), rel=1e-10)


def test_reference_bias_photomask_standards_match_scipy_t_interval():
    # NIST/SEMATECH e-Handbook §2.3.7.1: bias check of the optical imaging system on the low,
    # middle and high standards. Oracle: numpy mean/SD and scipy.stats.ttest_1samp.
    frame = _photomask()
    got = evaluate_reference_bias(frame, by=["standard"]).sort("standard")
    assert got["standard"].to_list() == ["L", "M", "U"]
    for row in got.iter_rows(named=True):
        part = frame.filter(pl.col("standard") == row["standard"])
        d = (part["measured"] - part["reference"]).to_numpy()
        res = stats.ttest_1samp(d, 0.0)
        ci = res.confidence_interval(0.95)
        assert row["n"] == 6
        assert row["bias"] == pytest.approx(d.mean(), rel=1e-12)
        assert row["bias_sd"] == pytest.approx(d.std(ddof=1), rel=1e-12)
        assert row["p_value"] == pytest.approx(res.pvalue, rel=1e-9)
        assert (row["bias_lo"], row["bias_hi"]) == pytest.approx((ci.low, ci.high), rel=1e-9)
    # the published readings sit above every reference value: a positive bias on all three standards
    assert (got["bias"] > 0).all()
