"""Dose-response for quantal responses (pure Python, no Django).

The model is p = F(a + b log10(dose)) for binomial counts (responding out of tested at each
dose), fitted by maximum likelihood with statsmodels' GLM, as in Finney's *Probit Analysis*.
F is the inverse of one of three links: logit (log-logistic curve), probit (log-normal) or
complementary log-log (Weibull in dose, asymmetric). EC50 is the dose where p = 0.5, i.e.
log10 EC50 = (link(0.5) - a) / b; link(0.5) is 0 for logit and probit, log(log 2) for cloglog.

Decisions, in this order (each one is stated on the study page):

1. **Flat data.** No response at any dose, or a full response at every dose: "no dose trend",
   nothing to fit.
2. **Separation.** When the doses with responders and the doses with non-responders do not
   overlap (complete separation) or overlap at one dose only (quasi-complete), the maximum-
   likelihood slope is infinite for all three links (the estimate exists exactly when the two
   sets overlap in more than a point: Albert & Anderson 1984 for the logit, Silvapulle 1981 for
   any link with a continuous inverse, from memory). No EC50: the report says where the
   response jumps and which doses to test.
3. **Link.** The three links are fitted; all have two parameters, so the lowest AIC is also the
   lowest deviance. The best by AIC is used unless the caller names a link.
4. **Heterogeneity** (extra-binomial variation, e.g. dishes that differ more than chance
   allows): Pearson X^2 of the chosen fit on its residual df, tested against chi-square at
   HETEROGENEITY_LEVEL. When significant, Finney's heterogeneity factor h = X^2 / df multiplies
   the variances, and t quantiles on df replace the normal ones (Finney 1971, ch. 4, from
   memory for the chapter). Pearson X^2 is unreliable when expected counts are small (under
   about 5): read it as a warning, not a verdict.
5. **Dose trend.** Likelihood-ratio test of b = 0: deviance of the intercept-only model minus
   the fit's, chi-square on 1 df; with the factor applied, that difference over h is referred
   to F on 1 and df degrees of freedom (the quasi-likelihood F test). p >= TREND_LEVEL is
   reported as "no dose trend": no EC50, no curve. This replaces an infinite or absurd EC50
   for a flat or nearly flat response.
6. **Interval for EC50** (95 %): Fieller's theorem on log10 EC50 when g = q^2 Var(b) / b^2 < 1
   (q the normal or t quantile); otherwise Fieller's set is unbounded and the interval is by
   profile likelihood: the log10 EC50 values m whose constrained fit (slope free, curve forced
   through 0.5 at m) has a deviance within q^2 h of the best. Since the trend test has the
   same level, the profile deviance tends to a value beyond that bound as m goes to either
   infinity, so the profile interval is bounded whenever a trend was found.

Doses must be positive (a log-dose model cannot place zero): report the control separately.
An EC50 outside the doses tested is marked ``extrapolated``. Floats end near 10^308: an
interval limit beyond 10^±300 (Fieller's with g a hair below 1) is None, "no limit on that
side", and a trend whose EC50 itself lies beyond that has status "beyond_range", no EC50.
"""
from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
import numpy.typing as npt
from scipy import optimize, stats
from statsmodels.genmod import families
from statsmodels.genmod.families import links
from statsmodels.genmod.generalized_linear_model import GLM

LINKS: dict[str, type[links.Link]] = {"logit": links.Logit, "probit": links.Probit, "cloglog": links.CLogLog}
LINK_LABELS = {"logit": "logit (log-logistic curve)", "probit": "probit (log-normal curve)",
               "cloglog": "complementary log-log (Weibull curve)"}
TREND_LEVEL = 0.05  # the slope test; the interval is at 1 - TREND_LEVEL, so the two agree (point 6)
HETEROGENEITY_LEVEL = 0.05  # Finney's practice: apply the factor when X^2 is significant at 5 % (from memory)
CONFIDENCE = 1 - TREND_LEVEL

Status = Literal["ec50", "no_trend", "separation", "beyond_range"]
Doses = float | Sequence[float] | npt.NDArray[np.floating]

# 10**x overflows a float above about x = 308.25; the profile search stays inside this.
_MAX_LOG10 = 300.0


@dataclass(frozen=True)
class LinkFit:
    """One link's binomial fit (variances not scaled by the heterogeneity factor)."""

    link: str
    intercept: float
    slope: float
    intercept_se: float
    slope_se: float
    deviance: float
    pearson_chi2: float
    aic: float

    @property
    def label(self) -> str:
        return LINK_LABELS[self.link]

    def predict(self, dose: Doses) -> float | npt.NDArray[np.float64]:
        """Fitted probability of response at ``dose`` (same unit as the fitted doses); dose 0 gives the limit."""
        values = np.asarray(dose, dtype=float)
        if np.any(~np.isfinite(values)) or np.any(values < 0):
            raise ValueError("dose must be a finite number >= 0")
        positive = values > 0
        log_dose = np.log10(np.where(positive, values, 1.0))
        # At dose 0 the linear predictor is -inf * slope: -inf or +inf, or the intercept for a flat slope.
        at_zero = -math.inf * np.sign(self.slope) if self.slope else self.intercept
        linear = np.where(positive, self.intercept + self.slope * log_dose, at_zero)
        probability = LINKS[self.link]().inverse(linear)
        return float(probability) if values.ndim == 0 else np.asarray(probability, dtype=float)


@dataclass(frozen=True)
class DoseResponseFit:
    """The outcome of `fit_dose_response`: an EC50, "no dose trend" or separation.

    ``intercept``, ``slope`` and their standard errors belong to the chosen ``link`` (slope per
    log10 unit of dose); the standard errors include the heterogeneity factor when it was
    applied. EC50 fields are None unless ``status == "ec50"``; ``reason`` says in words why
    there is no EC50. ``links`` holds every converged link fit for the comparison table.
    """

    status: Status
    reason: str
    n_groups: int
    df_resid: int
    link: str | None = None
    chosen_by: Literal["aic", "caller", ""] = ""
    links: tuple[LinkFit, ...] = ()
    intercept: float | None = None
    slope: float | None = None
    intercept_se: float | None = None
    slope_se: float | None = None
    deviance: float | None = None
    null_deviance: float | None = None
    pearson_chi2: float | None = None
    gof_p: float | None = None
    heterogeneity: float | None = None  # Pearson X^2 / df
    heterogeneity_applied: bool = False
    trend_test: str = ""
    trend_statistic: float | None = None
    trend_p: float | None = None
    quantile: float | None = None
    g: float | None = None
    ec50: float | None = None
    ec50_lower: float | None = None
    ec50_upper: float | None = None
    interval_method: Literal["fieller", "profile", ""] = ""
    extrapolated: bool = False
    method: str = ""
    trend_level: float = TREND_LEVEL
    heterogeneity_level: float = HETEROGENEITY_LEVEL

    @property
    def has_ec50(self) -> bool:
        return self.status == "ec50"

    @property
    def link_label(self) -> str:
        return LINK_LABELS[self.link] if self.link else ""

    @property
    def headline(self) -> str:
        """One sentence for a chart's note."""
        if self.status != "ec50":
            return self.reason
        interval = {"fieller": "Fieller's theorem", "profile": "profile likelihood (Fieller unbounded)"}
        label, chosen = self.link_label, "lowest AIC" if self.chosen_by == "aic" else "the caller"
        return (f"{label[0].upper()}{label[1:]} fit on log10 dose, chosen by {chosen}; EC50 95 % interval by "
                f"{interval[self.interval_method]}; heterogeneity factor {self.heterogeneity:.2f} "
                f"({'applied' if self.heterogeneity_applied else 'not applied'}).")

    @property
    def link_table(self) -> list[tuple[LinkFit, float, bool]]:
        """(fit, AIC above the best, chosen?) for each link, best first: the page's comparison table."""
        best = min((f.aic for f in self.links), default=0.0)
        return [(f, f.aic - best, f.link == self.link) for f in sorted(self.links, key=lambda f: f.aic)]

    @property
    def chosen(self) -> LinkFit | None:
        return next((f for f in self.links if f.link == self.link), None)

    def predict(self, dose: Doses) -> float | npt.NDArray[np.float64]:
        """The chosen link's fitted probability at ``dose``; ValueError when nothing was fitted."""
        if self.chosen is None:
            raise ValueError(f"no curve was fitted ({self.status}): nothing to predict")
        return self.chosen.predict(dose)


# --------------------------------------------------------------------------------------------
# Input
# --------------------------------------------------------------------------------------------
def _count_array(values: npt.ArrayLike, name: str) -> npt.NDArray[np.int64]:
    array = np.asarray(values, dtype=float).ravel()
    if not np.all(np.isfinite(array)):
        raise ValueError(f"{name} must be finite whole numbers")
    if np.any(array < 0):
        raise ValueError(f"{name} must not be negative: got {float(array.min()):g}")
    if np.any(array != np.round(array)):
        raise ValueError(f"{name} must be whole numbers of animals or dishes")
    return array.astype(np.int64)


def _dose_arrays(
    doses: npt.ArrayLike, n_responding: npt.ArrayLike, n_total: npt.ArrayLike
) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.int64], npt.NDArray[np.int64]]:
    dose = np.asarray(doses, dtype=float).ravel()
    responding = _count_array(n_responding, "n_responding")
    total = _count_array(n_total, "n_total")
    if not dose.size == responding.size == total.size:
        raise ValueError("doses, n_responding and n_total must have the same length: got "
                         f"{dose.size}, {responding.size} and {total.size}")
    if not np.all(np.isfinite(dose)):
        raise ValueError("doses must be finite numbers")
    if np.any(dose < 0):
        raise ValueError(f"doses must not be negative: got {float(dose.min()):g}")
    if np.any(dose == 0):
        raise ValueError("doses must be positive: the model uses log10(dose), which has no value at 0. "
                         "Leave the control (zero-dose) group out of the fit and report it separately.")
    if np.any(total == 0):
        raise ValueError("every dose group needs n_total >= 1")
    over = responding > total
    if np.any(over):
        i = int(np.argmax(over))
        raise ValueError(f"n_responding ({responding[i]}) exceeds n_total ({total[i]}) at dose {dose[i]:g}")
    n_doses = np.unique(dose).size
    if n_doses < 3:
        raise ValueError(f"at least 3 different doses are needed to fit a slope and judge the fit: got {n_doses}")
    return dose, responding, total


# --------------------------------------------------------------------------------------------
# Data that carry no slope: flat, or separated
# --------------------------------------------------------------------------------------------
def _flat_reason(responding: npt.NDArray[np.int64], total: npt.NDArray[np.int64]) -> str | None:
    n, tail = int(total.sum()), "so there is no EC50 within the doses tested."
    if not np.any(responding > 0):
        return f"No dose trend: none responded at any dose (0 of {n}), {tail}"
    if not np.any(responding < total):
        return f"No dose trend: all responded at every dose ({n} of {n}), {tail}"
    return None


def _separation_reason(dose, responding, total) -> str | None:
    """Describe complete or quasi-complete separation, or None when the two sets of doses overlap."""
    with_resp, with_non = dose[responding > 0], dose[responding < total]
    tail = ("the maximum-likelihood slope is infinite, so no EC50 or interval can be estimated "
            "(this holds for every link).")
    for rising, low_set, high_set in ((True, with_non, with_resp), (False, with_resp, with_non)):
        low, high = float(low_set.max()), float(high_set.min())
        none, all_ = ("none", "all") if rising else ("all", "none")
        if low < high:
            return (f"Complete separation: {none} responded at {low:g} or below and {all_} at {high:g} or above; "
                    f"{tail} The 50 % point lies somewhere between {low:g} and {high:g}: test doses in between.")
        if low == high:
            at = dose == low
            below, above = np.any(dose < low), np.any(dose > low)
            sides = [f"{none} responded below {low:g}"] if below else []
            sides += [f"{all_} responded above it"] if above else []
            return (f"Quasi-complete separation: {' and '.join(sides)}; at "
                    f"{low:g}, {int(responding[at].sum())} of {int(total[at].sum())} responded; {tail} "
                    f"Test doses around {low:g}.")
    return None


# --------------------------------------------------------------------------------------------
# Fits
# --------------------------------------------------------------------------------------------
def _binomial_glm(endog, exog, link: str, **options):
    return GLM(endog, exog, family=families.Binomial(LINKS[link]()), offset=options.pop("offset", None)).fit(**options)


def _fit_link(endog, exog, link: str) -> tuple[LinkFit, object] | None:
    """One link's fit and statsmodels' result; None if it failed to converge."""
    with warnings.catch_warnings():
        # IRLS far from the data overflows exp() on the way; convergence is checked instead.
        warnings.simplefilter("ignore")
        r = _binomial_glm(endog, exog, link)
        a, b = (float(v) for v in r.params)
        se_a, se_b = (float(v) for v in r.bse)
        fit = LinkFit(link, a, b, se_a, se_b, float(r.deviance), float(r.pearson_chi2), float(r.aic))
    if not r.converged or not all(map(math.isfinite, (se_a, se_b, fit.deviance, fit.pearson_chi2))):
        return None
    return fit, r


def _null_deviance(result) -> float:
    """Deviance of the intercept-only fit (the pooled proportion at every dose: the same for every link)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return float(result.null_deviance)


def _constrained_deviance(endog, x, m: float, fit: LinkFit, eta50: float) -> float:
    """Deviance of the best curve of ``fit``'s link forced through p = 0.5 at log10 dose ``m`` (slope free)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        # No start values: from the full fit's slope, IRLS far from the estimate can settle on a
        # saturated curve (deviance in the hundreds) and still report convergence.
        r = _binomial_glm(endog, (x - m)[:, None], fit.link, offset=np.full_like(x, eta50))
        return float(r.deviance)


def _fieller_interval(a: float, b: float, var_a: float, var_b: float, cov_ab: float, q: float
                      ) -> tuple[float, float] | None:
    """Fieller's interval for m = -a/b, or None when it is unbounded (g >= 1).

    The set {m : (a + b m)^2 <= q^2 Var(a + b m)} is the interval between the roots of
    A m^2 + 2 B m + C = 0 with A = b^2 (1 - g), B = a b - q^2 cov, C = a^2 - q^2 Var(a).
    """
    if q**2 * var_b / b**2 >= 1:
        return None
    quad_a = b**2 - q**2 * var_b
    quad_b = a * b - q**2 * cov_ab
    quad_c = a**2 - q**2 * var_a
    half_width = math.sqrt(max(quad_b**2 - quad_a * quad_c, 0.0)) / quad_a
    centre = -quad_b / quad_a
    return centre - half_width, centre + half_width


def _profile_interval(excess: Callable[[float], float], m_hat: float, span: float) -> tuple[float | None, float | None]:
    """Where ``excess`` (profile deviance above the best, less the critical value) crosses zero on each side.

    Steps outward from the estimate, growing by half each time, and takes the first crossing; None on
    a side where none is found before 10^±300 (not expected: see point 6 of the module docstring).
    """
    bounds: list[float | None] = []
    for direction in (-1.0, 1.0):
        inner, step, found = m_hat, span / 4, None
        while abs(inner + direction * step) <= _MAX_LOG10:
            outer = inner + direction * step
            if excess(outer) > 0:
                found = optimize.brentq(excess, min(inner, outer), max(inner, outer), xtol=1e-10)
                break
            inner, step = outer, step * 1.5
        bounds.append(found)
    return bounds[0], bounds[1]


def fit_dose_response(doses: npt.ArrayLike, n_responding: npt.ArrayLike, n_total: npt.ArrayLike, *,
                      link: str | None = None, heterogeneity_level: float = HETEROGENEITY_LEVEL) -> DoseResponseFit:
    """Fit p = F(a + b log10 dose) and decide as the module docstring says.

    One row per dose group; replicate dishes at one dose may be separate rows. ``link`` fixes the
    link ("logit", "probit", "cloglog"); None takes the best by AIC. Bad input raises ValueError;
    flat and separated data are results (``status``), not errors.
    """
    if link is not None and link not in LINKS:
        raise ValueError(f"link must be one of {', '.join(LINKS)}: got {link!r}")
    dose, responding, total = _dose_arrays(doses, n_responding, n_total)
    n_groups, df = int(np.unique(dose).size), dose.size - 2
    flat = _flat_reason(responding, total)
    if flat:
        return DoseResponseFit("no_trend", flat, n_groups, df)
    separated = _separation_reason(dose, responding, total)
    if separated:
        return DoseResponseFit("separation", separated, n_groups, df)

    x = np.log10(dose)
    exog = np.column_stack((np.ones_like(x), x))
    endog = np.column_stack((responding, total - responding)).astype(float)
    fitted = {name: _fit_link(endog, exog, name) for name in (LINKS if link is None else (link,))}
    fitted = {name: f for name, f in fitted.items() if f is not None}
    if not fitted:
        raise ValueError("the maximum-likelihood fit did not converge for any link; check the data")
    fits = tuple(f[0] for f in fitted.values())
    chosen = min(fits, key=lambda f: f.aic)
    result = fitted[chosen.link][1]
    binomial_cov, null_deviance = np.asarray(result.cov_params(), dtype=float), _null_deviance(result)

    pearson = chosen.pearson_chi2
    gof_p = float(stats.chi2.sf(pearson, df))
    factor = pearson / df
    applied = gof_p < heterogeneity_level and factor > 1
    scale = factor if applied else 1.0
    q = float(stats.t.ppf(0.5 + CONFIDENCE / 2, df) if applied else stats.norm.ppf(0.5 + CONFIDENCE / 2))

    drop = max(null_deviance - chosen.deviance, 0.0)
    if applied:
        trend_test, trend_stat = f"F on 1 and {df} df (likelihood ratio over the heterogeneity factor)", drop / scale
        trend_p = float(stats.f.sf(trend_stat, 1, df))
    else:
        trend_test, trend_stat, trend_p = "likelihood-ratio chi-square on 1 df", drop, float(stats.chi2.sf(drop, 1))

    cov = binomial_cov * scale
    var_a, var_b, cov_ab = float(cov[0, 0]), float(cov[1, 1]), float(cov[0, 1])
    a, b = chosen.intercept, chosen.slope
    common = dict(
        n_groups=n_groups, df_resid=df, link=chosen.link, chosen_by="aic" if link is None else "caller",
        links=fits, intercept=a, slope=b, intercept_se=math.sqrt(var_a), slope_se=math.sqrt(var_b),
        deviance=chosen.deviance, null_deviance=null_deviance, pearson_chi2=pearson, gof_p=gof_p,
        heterogeneity=factor, heterogeneity_applied=applied, trend_test=trend_test,
        trend_statistic=trend_stat, trend_p=trend_p, quantile=q, heterogeneity_level=heterogeneity_level,
    )
    het_text = (f"Pearson X² = {pearson:.3g} on {df} df (p = {gof_p:.2g}), heterogeneity factor X²/df = {factor:.3g}, "
                + (f"applied: variances × {factor:.3g}, t quantile on {df} df" if applied
                   else f"not applied ({'X²/df ≤ 1' if factor <= 1 else f'p ≥ {heterogeneity_level:g}'}): "
                        "binomial variance, normal quantile"))
    model_text = (f"{LINK_LABELS[chosen.link]} on log10 dose, binomial maximum likelihood (statsmodels GLM), "
                  + ("link with the lowest AIC of logit, probit and complementary log-log" if link is None
                     else "link fixed"))
    trend_text = f"dose trend: {trend_test}, statistic {trend_stat:.3g}, p = {trend_p:.2g} (level {TREND_LEVEL:g})"
    if trend_p >= TREND_LEVEL:
        reason = (f"No dose trend: the slope is not distinguishable from zero ({trend_test}, p = {trend_p:.2g} "
                  f"≥ {TREND_LEVEL:g}), so no EC50 is given.")
        return DoseResponseFit("no_trend", reason, method=f"{model_text}; {het_text}; {trend_text}", **common)

    eta50 = float(LINKS[chosen.link]()(np.array([0.5]))[0])
    m_hat = (eta50 - a) / b
    if abs(m_hat) > _MAX_LOG10:
        reason = (f"The slope differs from zero (p = {trend_p:.2g}) but the curve reaches 50 % only at 10^{m_hat:.0f}, "
                  "beyond any dose that can be given: no EC50 is given.")
        return DoseResponseFit("beyond_range", reason, method=f"{model_text}; {het_text}; {trend_text}", **common)
    g = q**2 * var_b / b**2
    fieller = _fieller_interval(a - eta50, b, var_a, var_b, cov_ab, q)
    if fieller is not None:
        (low, high), interval_method = fieller, "fieller"
        interval_text = f"95 % interval for EC50 by Fieller's theorem on log10 EC50 (g = {g:.3g})"
    else:
        crit = q**2 * scale

        def excess(m: float) -> float:
            return _constrained_deviance(endog, x, m, chosen, eta50) - chosen.deviance - crit

        low, high = _profile_interval(excess, m_hat, float(x.max() - x.min()))
        interval_method = "profile"
        interval_text = (f"95 % interval for EC50 by profile likelihood (Fieller's is unbounded: g = {g:.3g} ≥ 1; "
                         f"deviance within {crit:.3g} of the best)")
    ec50 = 10.0**m_hat
    return DoseResponseFit(
        "ec50", "", g=g, ec50=ec50, interval_method=interval_method,  # type: ignore[arg-type]
        ec50_lower=_pow10(low), ec50_upper=_pow10(high), extrapolated=not dose.min() <= ec50 <= dose.max(),
        method=f"{model_text}; {het_text}; {trend_text}; {interval_text}", **common,
    )


def _pow10(log_value: float | None) -> float | None:
    """10^x, or None (no limit on that side) beyond 10^±300, where a float cannot follow."""
    return None if log_value is None or abs(log_value) > _MAX_LOG10 else 10.0**log_value
