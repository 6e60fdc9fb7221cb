"""Shewhart chart constants computed from the normal distribution, not typed in.

d2(n) = E[R]/sigma and d3(n) = SD[R]/sigma for the range R of n normal values, by numerical integration
(Tippett 1925): E[R] = int (1 - F^n - (1-F)^n) dx and E[R^2] = 2 intint_{x<y} (1 - F(y)^n - (1-F(x))^n
+ (F(y)-F(x))^n) dx dy. c4(n) = sqrt(2/(n-1)) Gamma(n/2) / Gamma((n-1)/2). The others follow
(ASTM Manual on Presentation of Data and Control Chart Analysis): A2 = 3/(d2 sqrt n), A3 = 3/(c4 sqrt n),
B3/B4 = 1 -/+ 3 sqrt(1-c4^2)/c4, B5/B6 = c4 -/+ 3 sqrt(1-c4^2), D3/D4 = 1 -/+ 3 d3/d2 (lower ones >= 0).
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
from scipy import integrate, special
from scipy.stats import norm


@lru_cache(maxsize=256)
def d2(n: int) -> float:
    """Mean of the relative range of n normal values.

    >>> round(d2(2), 4), round(d2(5), 3)
    (1.1284, 2.326)
    """
    _check(n)
    f = lambda x: 1.0 - norm.cdf(x) ** n - norm.sf(x) ** n  # noqa: E731
    return float(integrate.quad(f, -12, 12, limit=200, epsabs=1e-12)[0])


@lru_cache(maxsize=256)
def d3(n: int) -> float:
    """Standard deviation of the relative range of n normal values.

    >>> round(d3(2), 3)
    0.853
    """
    _check(n)
    # Gauss-Legendre in y over [-12, 12] and, for each y, in x over [-12, y] (smooth integrands).
    t, w = np.polynomial.legendre.leggauss(160)
    y = 12.0 * t
    wy = 12.0 * w
    x = (y[:, None] + 12.0) / 2 * t[None, :] + (y[:, None] - 12.0) / 2
    wx = (y[:, None] + 12.0) / 2 * w[None, :]
    fy = norm.cdf(y)[:, None]
    g = 1.0 - fy**n - norm.sf(x) ** n + np.clip(fy - norm.cdf(x), 0.0, 1.0) ** n
    e_r2 = 2.0 * float(np.sum(wy * np.sum(wx * g, axis=1)))
    return math.sqrt(e_r2 - d2(n) ** 2)


def c4(n: int) -> float:
    """Bias factor of the sample SD: E[s] = c4 sigma.

    >>> round(c4(5), 4)
    0.94
    """
    _check(n)
    return math.sqrt(2.0 / (n - 1)) * math.exp(special.gammaln(n / 2) - special.gammaln((n - 1) / 2))


def factors(n: int) -> dict[str, float]:
    """All printed Shewhart factors for subgroup size n (A2, A3, c4, B3-B6, d2, d3, D3, D4)."""
    c, r2, r3 = c4(n), d2(n), d3(n)
    s = math.sqrt(1 - c * c)
    return {
        "A2": 3 / (r2 * math.sqrt(n)),
        "A3": 3 / (c * math.sqrt(n)),
        "c4": c,
        "B3": max(0.0, 1 - 3 * s / c),
        "B4": 1 + 3 * s / c,
        "B5": max(0.0, c - 3 * s),
        "B6": c + 3 * s,
        "d2": r2,
        "d3": r3,
        "D3": max(0.0, 1 - 3 * r3 / r2),
        "D4": 1 + 3 * r3 / r2,
    }


def _check(n: int) -> None:
    if int(n) != n or n < 2:
        raise ValueError(f"subgroup size must be an integer >= 2, found {n}.")
