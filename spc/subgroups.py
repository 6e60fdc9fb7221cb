"""Subgroup statistics over nested data (lot > wafer > site): mean, SD, range and size per group.

Input: any frame with the grouping columns and a value column. Output: one row per group with
``mean``, ``sd`` (n-1 denominator; null for n = 1), ``range`` and ``n``, in first-appearance order.
Chain the calls to go up a level: site values -> wafer summaries -> lot summaries of wafer means.
"""

from __future__ import annotations

from collections.abc import Sequence

import polars as pl


def summarize_subgroups(frame: pl.DataFrame, by: Sequence[str], value: str = "value") -> pl.DataFrame:
    """Mean, SD, range and count of `value` per group of `by`.

    >>> df = pl.DataFrame({"lot": ["L1"] * 3, "wafer": [1, 1, 2], "cd": [45.0, 47.0, 46.0]})
    >>> summarize_subgroups(df, ["lot", "wafer"], "cd").rows()
    [('L1', 1, 46.0, 1.4142135623730951, 2.0, 2), ('L1', 2, 46.0, None, 0.0, 1)]
    """
    v = pl.col(value).cast(pl.Float64)
    return frame.group_by(list(by), maintain_order=True).agg(
        v.mean().alias("mean"),
        v.std(ddof=1).alias("sd"),
        (v.max() - v.min()).alias("range"),
        pl.len().cast(pl.Int64).alias("n"),
    )
