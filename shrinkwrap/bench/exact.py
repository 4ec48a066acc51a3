"""Two exact distribution figures in numpy and the standard library, so that the serving install needs no
scipy: Student's t quantile (the mean's confidence interval) and a binomial upper tail (the report's
class cautions). tests/test_serving_install.py checks both against scipy.stats."""
from __future__ import annotations

import math

import numpy as np


def t_two_sided_mass(t: float, df: int) -> float:
    """P(|T| < t) for Student's t with `df` (a whole number ≥ 1) degrees of freedom: the finite series in
    θ = atan(t / √df) of Abramowitz & Stegun, Handbook of Mathematical Functions, 26.7.3 (odd df) and
    26.7.4 (even df)."""
    theta = math.atan(t / math.sqrt(df))
    s, c2 = math.sin(theta), math.cos(theta) ** 2
    if df % 2:  # odd: 2/π [θ + sin θ cos θ (1 + 2/3 cos²θ + 2·4/(3·5) cos⁴θ + …)], up to cos^(df−2)
        k = np.arange(1, (df - 1) // 2)
        terms = np.cumprod(2 * k / (2 * k + 1) * c2) if len(k) else np.array([])
        series = 0.0 if df == 1 else s * math.cos(theta) * (1.0 + float(terms.sum()))
        return 2 / math.pi * (theta + series)
    k = np.arange(1, df // 2)  # even: sin θ (1 + 1/2 cos²θ + 1·3/(2·4) cos⁴θ + …), up to cos^(df−2)
    terms = np.cumprod((2 * k - 1) / (2 * k) * c2) if len(k) else np.array([])
    return s * (1.0 + float(terms.sum()))


def t_quantile(q: float, df: int) -> float:
    """The q-quantile (0.5 < q < 1) of Student's t with `df` degrees of freedom, by bisection on the exact
    distribution function above (to about 1e-12)."""
    mass = 2 * q - 1
    lo, hi = 0.0, 1.0
    while t_two_sided_mass(hi, df) < mass:
        hi *= 2
    for _ in range(200):
        mid = (lo + hi) / 2
        lo, hi = (mid, hi) if t_two_sided_mass(mid, df) < mass else (lo, mid)
        if hi - lo < 1e-12 * max(1.0, hi):
            break
    return (lo + hi) / 2


def binomial_upper_tail(k: int, n: int, p: float) -> float:
    """P(X ≥ k) for X ~ Binomial(n, p): the sum of the probabilities of k … n, each in log space
    (lgamma) so that large n does not overflow."""
    if k <= 0:
        return 1.0
    if k > n:
        return 0.0
    if p <= 0.0:
        return 0.0
    if p >= 1.0:
        return 1.0
    i = np.arange(k, n + 1)
    log_pmf = (math.lgamma(n + 1) - np.array([math.lgamma(x + 1) + math.lgamma(n - x + 1) for x in i])
               + i * math.log(p) + (n - i) * math.log1p(-p))
    return float(min(1.0, np.exp(log_pmf).sum()))
