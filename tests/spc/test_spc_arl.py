"""ARL design: identities, Markov chain against seeded simulation, published tables."""

from __future__ import annotations

import pytest
from scipy.stats import norm

from spc.arl import (
    cusum_arl,
    ewma_arl,
    expected_arl,
    shewhart_arl,
    simulate_arl,
    solve_cusum_h,
    solve_ewma_width,
    solve_shewhart_width,
)
from spc.cusum import CusumParams
from spc.ewma import EwmaParams


def test_shewhart_arl_rule1_alone_is_one_over_0027():
    # Rule 1 alone: ARL = 1 / P(|Z| > 3) = 370.4 (Montgomery, Introduction to SQC; domain notes).
    assert shewhart_arl(["we1"])[0].arl == pytest.approx(1 / (2 * norm.sf(3.0)), rel=1e-12)
    assert round(shewhart_arl(["we1"])[0].arl, 1) == 370.4
    # Shifted mean: 1 / (P(Z > 3 - d) + P(Z < -3 - d)), the standard formula.
    d = 1.0
    assert shewhart_arl(["nelson1"], [d])[0].arl == pytest.approx(
        1 / (norm.sf(3 - d) + norm.cdf(-3 - d)), rel=1e-12
    )


def test_expected_arl_western_electric_set_matches_champ_woodall():
    # Champ & Woodall (1987) Technometrics 29(4): all four WE rules, in-control ARL 91.75 (from memory).
    assert expected_arl(["we1", "we2", "we3", "we4"]).arl == pytest.approx(91.75, abs=0.01)


@pytest.mark.parametrize(
    "rules",
    [
        ["we1", "we2"],
        ["we1", "we4"],
        ["we3"],
        ["nelson1", "nelson2", "nelson5", "nelson6", "nelson7", "nelson8"],
    ],
)
@pytest.mark.parametrize("shift", [0.0, 1.0])
def test_shewhart_arl_markov_agrees_with_seeded_simulation(rules, shift):
    exact = shewhart_arl(rules, [shift], method="markov")[0]
    sim = simulate_arl("shewhart", rules, shift, n_rep=3000, seed=11)
    assert abs(exact.arl - sim.arl) < 3 * sim.se


def test_shewhart_arl_trend_rules_are_simulated_with_standard_error():
    r = shewhart_arl(["nelson3", "nelson4"], [0.0], n_rep=1500, seed=3)[0]
    assert r.method == "simulation" and 0 < r.se < 0.1 * r.arl
    assert shewhart_arl(["nelson3", "nelson4"], [0.0], n_rep=1500, seed=3)[0] == r  # seeded: reproducible


# Lucas & Saccucci (1990) Technometrics 32(1), Table 3 as reprinted in Montgomery's SQC text (from memory).
@pytest.mark.parametrize(
    ("lam", "L", "table"),
    [
        (0.10, 2.814, {0.0: 500, 0.5: 31.3, 1.0: 10.3, 2.0: 4.4, 3.0: 2.9}),
        (0.20, 2.962, {0.0: 500, 0.5: 41.8, 1.0: 10.5, 2.0: 3.7}),
        (0.40, 3.054, {0.0: 500, 0.5: 71.2, 1.0: 14.3, 2.0: 3.5}),
    ],
)
def test_ewma_arl_matches_lucas_saccucci_table_from_memory(lam, L, table):
    got = ewma_arl(lam, L, list(table))
    for r in got:
        assert r.arl == pytest.approx(table[r.shift], rel=0.02)


# Two-sided CUSUM, k = 1/2 (Montgomery's SQC text, table of CUSUM ARLs after Hawkins; from memory).
@pytest.mark.parametrize(
    ("h", "table"),
    [
        (4.0, {0.0: 168, 0.5: 26.6, 1.0: 8.38, 2.0: 3.34, 3.0: 2.19}),
        (5.0, {0.0: 465, 0.5: 38.0, 1.0: 10.4, 2.0: 4.01, 3.0: 2.57}),
    ],
)
def test_cusum_arl_matches_standard_table_from_memory(h, table):
    for r in cusum_arl(0.5, h, list(table)):
        assert r.arl == pytest.approx(table[r.shift], rel=0.02)


@pytest.mark.parametrize("shift", [0.0, 1.0])
def test_ewma_arl_markov_agrees_with_seeded_simulation(shift):
    exact = ewma_arl(0.2, 2.86, [shift])[0]
    sim = simulate_arl("ewma", EwmaParams(lam=0.2, L=2.86, limits="asymptotic"), shift, n_rep=2000, seed=5)
    assert abs(exact.arl - sim.arl) < 3 * sim.se


@pytest.mark.parametrize(("shift", "headstart"), [(0.0, 0.0), (1.0, 0.0), (1.0, 2.0)])
def test_cusum_arl_markov_agrees_with_seeded_simulation(shift, headstart):
    exact = cusum_arl(0.5, 4.0, [shift], headstart=headstart)[0]
    sim = simulate_arl("cusum", CusumParams(k=0.5, h=4.0, headstart=headstart), shift, n_rep=2000, seed=9)
    assert abs(exact.arl - sim.arl) < 3 * sim.se


def test_solvers_recover_published_designs():
    assert solve_ewma_width(0.1, 500) == pytest.approx(2.814, abs=0.005)  # Lucas & Saccucci (from memory)
    assert solve_cusum_h(0.5, 465) == pytest.approx(5.0, abs=0.02)  # table above (from memory)
    assert solve_shewhart_width(["we1"], 1 / (2 * norm.sf(3.0))) == pytest.approx(3.0, abs=1e-5)


def test_solvers_refuse_impossible_targets():
    with pytest.raises(ValueError, match="must be > 1"):
        solve_ewma_width(0.1, 0.5)
    with pytest.raises(ValueError, match="needs a beyond-limits rule"):
        solve_shewhart_width(["we4"], 200)
