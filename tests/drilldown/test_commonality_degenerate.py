"""rank_commonality when no candidate is testable (every lot ran the one tool): a result, not a crash."""

import math

import polars as pl

from spc.commonality import rank_commonality


def test_rank_commonality_all_candidates_degenerate_returns_untested_rows():
    # One step, one tool: the 2x2 table has an empty row, so no test applies (Fisher 1935 needs both margins).
    h = pl.DataFrame({"lot_id": ["L1", "L2", "L3"], "step": ["S"] * 3, "process_tool": ["T1"] * 3})
    out = rank_commonality(h, ["L1"])
    assert out.height == 1
    assert out["test"].to_list() == [None]
    assert math.isnan(out["p_assoc"][0])
