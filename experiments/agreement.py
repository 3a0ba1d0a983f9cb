"""Agreement between two ways of scoring the same trials (pure; no Django).

Bland-Altman (Bland & Altman 1986, Lancet 327:307-310): the differences d = a - b of paired
measurements; bias = mean(d), s = SD(d) (n - 1 in the denominator), limits of agreement
bias ± z·s (z = 1.96 for 95 %; the 1986 paper rounded it to 2). Confidence intervals as in the
paper: bias ± t(n-1)·s/√n, each limit ± t(n-1)·√(3 s²/n).

Cohen's kappa (Cohen 1960, Educ. Psychol. Meas. 20:37-46) for two raters' yes/no calls:
κ = (po - pe) / (1 - pe), po the observed share of agreement, pe the agreement expected by chance
from each rater's own shares. Standard error under the large-sample formula of Fleiss, Cohen &
Everitt (1969, Psychol. Bull. 72:323-327), the one statsmodels' cohens_kappa reports as std_kappa.
Undefined (None) when both raters give one and the same answer every time (pe = 1).
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from scipy import stats

Z95 = 1.959963984540054  # the normal 97.5 % quantile


@dataclass(frozen=True)
class BlandAltman:
    n: int
    bias: float
    sd: float
    lower: float
    upper: float
    z: float
    bias_ci: tuple[float, float]
    lower_ci: tuple[float, float]
    upper_ci: tuple[float, float]


@dataclass(frozen=True)
class Kappa:
    n: int
    kappa: float | None
    observed: float  # po
    expected: float  # pe
    se: float | None
    table: tuple[tuple[int, int], tuple[int, int]]  # rows: a yes/no; columns: b yes/no


def bland_altman(a: Sequence[float], b: Sequence[float], *, z: float = Z95, level: float = 0.95) -> BlandAltman | None:
    """Bias and limits of agreement of a - b; None with fewer than 2 pairs (no SD)."""
    if len(a) != len(b):
        raise ValueError(f"Pairs: {len(a)} values against {len(b)}.")
    d = [float(x) - float(y) for x, y in zip(a, b)]
    n = len(d)
    if n < 2:
        return None
    bias = sum(d) / n
    sd = math.sqrt(sum((x - bias) ** 2 for x in d) / (n - 1))
    t = float(stats.t.ppf(0.5 + level / 2, n - 1))
    half_bias = t * sd / math.sqrt(n)
    half_limit = t * math.sqrt(3 * sd ** 2 / n)
    lower, upper = bias - z * sd, bias + z * sd
    return BlandAltman(n=n, bias=bias, sd=sd, lower=lower, upper=upper, z=z,
                       bias_ci=(bias - half_bias, bias + half_bias),
                       lower_ci=(lower - half_limit, lower + half_limit),
                       upper_ci=(upper - half_limit, upper + half_limit))


def cohens_kappa(a: Sequence[bool], b: Sequence[bool]) -> Kappa | None:
    """κ for two yes/no ratings of the same items; None with no items."""
    if len(a) != len(b):
        raise ValueError(f"Pairs: {len(a)} ratings against {len(b)}.")
    n = len(a)
    if n == 0:
        return None
    yy = sum(1 for x, y in zip(a, b) if x and y)
    yn = sum(1 for x, y in zip(a, b) if x and not y)
    ny = sum(1 for x, y in zip(a, b) if not x and y)
    nn = n - yy - yn - ny
    table = ((yy, yn), (ny, nn))
    po = (yy + nn) / n
    a_yes, b_yes = (yy + yn) / n, (yy + ny) / n
    a_no, b_no = 1 - a_yes, 1 - b_yes
    pe = a_yes * b_yes + a_no * b_no
    if pe >= 1 - 1e-12:
        return Kappa(n=n, kappa=None, observed=po, expected=pe, se=None, table=table)
    kappa = (po - pe) / (1 - pe)
    # Fleiss, Cohen & Everitt (1969), eq. for the standard error of kappa when kappa is not 0.
    p = [[yy / n, yn / n], [ny / n, nn / n]]
    rows, cols = [a_yes, a_no], [b_yes, b_no]
    term = sum(p[i][i] * (1 - (rows[i] + cols[i]) * (1 - kappa)) ** 2 for i in range(2))
    term += (1 - kappa) ** 2 * sum(p[i][j] * (cols[i] + rows[j]) ** 2 for i in range(2) for j in range(2) if i != j)
    term -= (kappa - pe * (1 - kappa)) ** 2
    # A negative variance comes only from degenerate tables (e.g. κ = 0 with an empty cell): no standard error.
    se = math.sqrt(max(term, 0.0) / n) / (1 - pe) if term > -1e-12 else None
    return Kappa(n=n, kappa=kappa, observed=po, expected=pe, se=se, table=table)
