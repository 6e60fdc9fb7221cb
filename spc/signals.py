"""One driver for a chart check: run rules, EWMA and CUSUM over every series in one pass.

Signal rule ids: the run-rule ids of `spc.rules`, ``ewma`` (value = the EWMA statistic in data units) and
``cusum_hi`` / ``cusum_lo`` (value = the sum in sigma units). Signals advise; the fab's OCAP decides.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import polars as pl

from spc.cusum import CUSUM_HI, CUSUM_LO, CusumParams, cusum_arrays
from spc.ewma import EWMA, EwmaParams, ewma_arrays
from spc.frames import gather_signals, layout_points
from spc.rules import RuleParams, rule_masks


def evaluate_signals(
    points: pl.DataFrame,
    rules: Sequence[str | RuleParams] = (),
    *,
    ewma: EwmaParams | None = None,
    cusum: CusumParams | None = None,
    passthrough: Sequence[str] = (),
) -> pl.DataFrame:
    """Signals frame of the requested rules, EWMA and CUSUM, in point order.

    >>> pts = pl.DataFrame({"series": "A", "seq": [1, 2, 3], "value": [0.0, 3.2, 0.1],
    ...                     "center": 0.0, "sigma": 1.0})
    >>> evaluate_signals(pts, ["we1"], ewma=EwmaParams(lam=0.5, L=2.0)).select("seq", "rule").rows()
    [(2, 'we1'), (2, 'ewma')]
    """
    lay = layout_points(points)
    hits = rule_masks(lay, rules)
    values: dict[str, np.ndarray] = {}
    if ewma is not None:
        w, limit, _ = ewma_arrays(lay, ewma)
        center = lay.frame["center"].cast(pl.Float64).to_numpy()
        sigma = lay.frame["sigma"].cast(pl.Float64).to_numpy()
        hits.append((EWMA, np.abs(w) > limit))
        values[EWMA] = center + sigma * w
    if cusum is not None:
        s_hi, s_lo, _, _ = cusum_arrays(lay, cusum)
        hits += [(CUSUM_HI, s_hi > cusum.h), (CUSUM_LO, s_lo > cusum.h)]
        values[CUSUM_HI], values[CUSUM_LO] = s_hi, s_lo
    return gather_signals(lay, hits, passthrough, values)
