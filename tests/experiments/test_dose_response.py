"""Tests for experiments/dose_response.py: links compared, heterogeneity, no trend, separation, intervals.

Pure module, no database. Published values are named beside each check; statsmodels' GLM fitted here
directly, a hand Newton-Raphson, Collett's closed form for Fieller's limits and a profile likelihood
written out below with scipy's optimisers are the independent references.
"""
import dataclasses
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize, special, stats
from statsmodels.genmod import families
from statsmodels.genmod.families import links
from statsmodels.genmod.generalized_linear_model import GLM

from experiments.dose_response import LINKS, DoseResponseFit, fit_dose_response

# Beetle mortality after 5 h exposure to gaseous carbon disulphide, Bliss (1935), as analysed
# in Dobson & Barnett, An Introduction to Generalized Linear Models, ch. 7 (data Table 7.2,
# fits Table 7.3: table numbers from memory). The doses are already log10(CS2 mg/L).
BEETLE_LOG10_DOSE = [1.6907, 1.7242, 1.7552, 1.7842, 1.8113, 1.8369, 1.8610, 1.8839]
BEETLE_N = [59, 60, 62, 56, 63, 59, 62, 60]
BEETLE_KILLED = [6, 13, 18, 28, 52, 53, 61, 60]
BEETLE_DOSE = [10**x for x in BEETLE_LOG10_DOSE]

STATSMODELS_LINKS = {"logit": links.Logit, "probit": links.Probit, "cloglog": links.CLogLog}
# Inverse links and the linear predictor at p = 0.5, written out by hand for the independent checks.
INVERSE = {"logit": special.expit, "probit": stats.norm.cdf, "cloglog": lambda eta: -np.expm1(-np.exp(eta))}
ETA50 = {"logit": 0.0, "probit": 0.0, "cloglog": math.log(math.log(2.0))}

# Invented dish counts with more scatter between doses than binomial (heterogeneity), 20 dishes a dose.
SCATTER_DOSE, SCATTER_N, SCATTER_RESPONDING = [1, 2, 4, 8, 16, 32], [20] * 6, [0, 6, 3, 13, 14, 20]


def _glm(link, x=BEETLE_LOG10_DOSE, y=BEETLE_KILLED, n=BEETLE_N):
    x, y, n = np.asarray(x, float), np.asarray(y, float), np.asarray(n, float)
    model = GLM(np.column_stack((y, n - y)), np.column_stack((np.ones_like(x), x)),
                family=families.Binomial(STATSMODELS_LINKS[link]()))
    return model.fit()


def _glm_x2_scale(link, x=BEETLE_LOG10_DOSE, y=BEETLE_KILLED, n=BEETLE_N):
    """statsmodels' quasi-binomial fit, scale = Pearson X^2 / df. Given as proportions with var_weights = n:
    with (responding, not responding) columns statsmodels 0.15 leaves n out of the X2 scale
    (GLM._estimate_x2_scale weights by iweights only), which gives a meaningless scale."""
    x, y, n = np.asarray(x, float), np.asarray(y, float), np.asarray(n, float)
    model = GLM(y / n, np.column_stack((np.ones_like(x), x)), family=families.Binomial(STATSMODELS_LINKS[link]()),
                var_weights=n)
    return model.fit(scale="X2")


def _newton_logistic(x, y, n, iterations=50):
    """Hand check: Newton-Raphson for logit(p) = a + b x on binomial counts."""
    design = np.column_stack((np.ones_like(x), x))
    beta = np.zeros(2)
    for _ in range(iterations):
        p = 1 / (1 + np.exp(-design @ beta))
        score = design.T @ (y - n * p)
        information = design.T @ (design * (n * p * (1 - p))[:, None])
        beta = beta + np.linalg.solve(information, score)
    p = 1 / (1 + np.exp(-design @ beta))
    information = design.T @ (design * (n * p * (1 - p))[:, None])
    return beta, np.linalg.inv(information)


def _collett_fieller(a, b, v00, v11, v01, q):
    """Fieller limits for log10 ED50 = -a/b in the form of Collett, Modelling Binary Data, §4.2 (from memory)."""
    m, g = -a / b, q**2 * v11 / b**2
    centre = m + g / (1 - g) * (m + v01 / v11)
    radicand = v00 + 2 * m * v01 + m**2 * v11 - g * (v00 - v01**2 / v11)
    half = q / (abs(b) * (1 - g)) * math.sqrt(radicand)
    return centre - half, centre + half


# --- The logit fit on a published dataset -------------------------------------------------------


def test_logit_fit_reproduces_dobson_beetle_logit_fit():
    fit = fit_dose_response(BEETLE_DOSE, BEETLE_KILLED, BEETLE_N, link="logit")
    # Dobson & Barnett ch. 7 (Bliss 1935 beetle data), logistic model: b1 = -60.72 (s.e. 5.18),
    # b2 = 34.27 (s.e. 2.91), deviance D = 11.23 on 6 df. Cross-checked against the glmlab
    # manual (Dunn, Univ. of Southern Queensland), which reprints -60.717455 (5.180701),
    # 34.270326 (2.912134), scaled deviance 11.232231 and says they agree with Dobson.
    assert fit.intercept == pytest.approx(-60.72, abs=0.005)
    assert fit.slope == pytest.approx(34.27, abs=0.005)
    assert fit.intercept_se == pytest.approx(5.18, abs=0.005)
    assert fit.slope_se == pytest.approx(2.91, abs=0.005)
    assert fit.deviance == pytest.approx(11.23, abs=0.005)
    assert fit.df_resid == 6 and fit.n_groups == 8
    # log10 LD50 = 60.717 / 34.270 = 1.7718 [C from the published coefficients].
    assert math.log10(fit.ec50) == pytest.approx(60.717455 / 34.270326, rel=1e-5)
    assert (fit.status, fit.chosen_by, fit.interval_method) == ("ec50", "caller", "fieller")
    assert fit.ec50_lower < fit.ec50 < fit.ec50_upper


def test_logit_fit_matches_statsmodels_glm_and_hand_newton_raphson():
    x, y, n = np.array(BEETLE_LOG10_DOSE), np.array(BEETLE_KILLED, float), np.array(BEETLE_N, float)
    fit = fit_dose_response(BEETLE_DOSE, BEETLE_KILLED, BEETLE_N, link="logit")

    glm = _glm("logit")
    assert fit.intercept == pytest.approx(glm.params[0], rel=1e-6)
    assert fit.slope == pytest.approx(glm.params[1], rel=1e-6)
    assert fit.slope_se == pytest.approx(glm.bse[1], rel=1e-6)
    assert fit.deviance == pytest.approx(glm.deviance, rel=1e-8)
    assert fit.pearson_chi2 == pytest.approx(glm.pearson_chi2, rel=1e-8)

    beta, cov = _newton_logistic(x, y, n)
    assert fit.intercept == pytest.approx(beta[0], rel=1e-6)
    assert fit.slope == pytest.approx(beta[1], rel=1e-6)
    assert fit.slope_se == pytest.approx(math.sqrt(cov[1, 1]), rel=1e-5)

    # Pearson chi-square by hand and its p value on 8 - 2 df.
    p = 1 / (1 + np.exp(-(beta[0] + beta[1] * x)))
    pearson = float(np.sum((y - n * p) ** 2 / (n * p * (1 - p))))
    assert fit.pearson_chi2 == pytest.approx(pearson, rel=1e-6)
    assert fit.gof_p == pytest.approx(stats.chi2.sf(pearson, 6), rel=1e-5)


# --- Links compared on the same published dataset -----------------------------------------------


def test_three_links_on_beetle_data_match_statsmodels_and_dobson():
    fit = fit_dose_response(BEETLE_DOSE, BEETLE_KILLED, BEETLE_N)
    by_link = {f.link: f for f in fit.links}
    assert set(by_link) == set(LINKS)
    for name, link in by_link.items():
        glm = _glm(name)
        assert (link.intercept, link.slope) == pytest.approx(tuple(glm.params), rel=1e-6)
        assert (link.intercept_se, link.slope_se) == pytest.approx(tuple(glm.bse), rel=1e-6)
        assert link.deviance == pytest.approx(glm.deviance, rel=1e-8)
        assert link.pearson_chi2 == pytest.approx(glm.pearson_chi2, rel=1e-8)
        assert link.aic == pytest.approx(glm.aic, rel=1e-10)
    # Dobson & Barnett ch. 7, the table comparing dose-response models for the beetle data
    # (from memory: Table 7.5 in the 3rd edition): deviances logistic 11.23, probit 10.12,
    # extreme value (complementary log-log) 3.45; probit b1 = -34.94 (2.65), b2 = 19.73 (1.49);
    # extreme value b1 = -39.57 (3.24), b2 = 22.04 (1.80).
    assert [by_link[k].deviance for k in ("logit", "probit", "cloglog")] == pytest.approx([11.23, 10.12, 3.45], abs=0.005)
    assert (by_link["probit"].intercept, by_link["probit"].slope) == pytest.approx((-34.94, 19.73), abs=0.005)
    assert (by_link["probit"].intercept_se, by_link["probit"].slope_se) == pytest.approx((2.65, 1.49), abs=0.005)
    assert (by_link["cloglog"].intercept, by_link["cloglog"].slope) == pytest.approx((-39.57, 22.04), abs=0.005)
    assert (by_link["cloglog"].intercept_se, by_link["cloglog"].slope_se) == pytest.approx((3.24, 1.80), abs=0.005)
    # The best by AIC is chosen; with two parameters each, AIC differences are deviance differences.
    assert (fit.link, fit.chosen_by) == ("cloglog", "aic")
    table = fit.link_table
    assert [(f.link, chosen) for f, _, chosen in table] == [("cloglog", True), ("probit", False), ("logit", False)]
    assert table[2][1] == pytest.approx(by_link["logit"].deviance - by_link["cloglog"].deviance, rel=1e-8)
    assert "lowest AIC" in fit.method and "complementary log-log" in fit.method


def test_cloglog_ec50_is_where_the_curve_crosses_one_half():
    fit = fit_dose_response(BEETLE_DOSE, BEETLE_KILLED, BEETLE_N)
    glm = _glm("cloglog")
    a, b = glm.params
    # cloglog(0.5) = log(-log(0.5)) = log(log 2): the EC50 is not at a + b x = 0 as for the logit.
    assert math.log10(fit.ec50) == pytest.approx((math.log(math.log(2)) - a) / b, rel=1e-8)
    assert fit.predict(fit.ec50) == pytest.approx(0.5, abs=1e-12)
    assert INVERSE["cloglog"](a + b * math.log10(fit.ec50)) == pytest.approx(0.5, abs=1e-12)


# --- Heterogeneity factor (Finney) ---------------------------------------------------------------


def test_beetle_logit_shows_no_significant_heterogeneity_so_no_factor_is_applied():
    fit = fit_dose_response(BEETLE_DOSE, BEETLE_KILLED, BEETLE_N, link="logit")
    glm = _glm("logit")
    assert fit.heterogeneity == pytest.approx(glm.pearson_chi2 / glm.df_resid, rel=1e-8)
    assert fit.gof_p > 0.05 and not fit.heterogeneity_applied
    assert fit.quantile == pytest.approx(stats.norm.ppf(0.975))
    assert fit.trend_test.startswith("likelihood-ratio chi-square")
    assert fit.trend_statistic == pytest.approx(glm.null_deviance - glm.deviance, rel=1e-8)


def test_heterogeneity_factor_scales_variances_like_statsmodels_x2_scale_on_beetle_data():
    # Forcing the factor (level 1) on published data: X^2/df = 10.03/6 for the logit fit.
    fit = fit_dose_response(BEETLE_DOSE, BEETLE_KILLED, BEETLE_N, link="logit", heterogeneity_level=1.0)
    scaled = _glm_x2_scale("logit")
    assert fit.heterogeneity_applied
    assert fit.heterogeneity == pytest.approx(scaled.scale, rel=1e-8)
    assert (fit.intercept_se, fit.slope_se) == pytest.approx(tuple(scaled.bse), rel=1e-6)
    q = stats.t.ppf(0.975, 6)
    assert fit.quantile == pytest.approx(q)
    # The trend is then an F test: the deviance drop over the factor, on 1 and 6 df.
    f_stat = (scaled.null_deviance - scaled.deviance) / scaled.scale
    assert fit.trend_statistic == pytest.approx(f_stat, rel=1e-8)
    assert fit.trend_p == pytest.approx(stats.f.sf(f_stat, 1, 6), rel=1e-8)
    # Fieller with the scaled covariance and t on 6 df.
    cov = np.asarray(scaled.cov_params())
    low, high = _collett_fieller(*scaled.params, cov[0, 0], cov[1, 1], cov[0, 1], q)
    assert (math.log10(fit.ec50_lower), math.log10(fit.ec50_upper)) == pytest.approx((low, high), rel=1e-6)
    unscaled = fit_dose_response(BEETLE_DOSE, BEETLE_KILLED, BEETLE_N, link="logit")
    assert fit.ec50 == pytest.approx(unscaled.ec50)
    assert fit.ec50_lower < unscaled.ec50_lower and fit.ec50_upper > unscaled.ec50_upper


def test_factor_below_one_is_never_applied():
    # The beetle cloglog fit scatters less than binomial (X^2/df = 3.29/6): Finney applies no factor below 1.
    fit = fit_dose_response(BEETLE_DOSE, BEETLE_KILLED, BEETLE_N, heterogeneity_level=1.0)
    assert fit.link == "cloglog" and fit.heterogeneity < 1 and not fit.heterogeneity_applied
    assert "X²/df ≤ 1" in fit.method


def test_scatter_between_dishes_applies_the_factor_and_widens_the_interval():
    fit = fit_dose_response(SCATTER_DOSE, SCATTER_RESPONDING, SCATTER_N)
    glm = _glm_x2_scale(fit.link, np.log10(SCATTER_DOSE), SCATTER_RESPONDING, SCATTER_N)
    df = len(SCATTER_DOSE) - 2
    assert fit.gof_p == pytest.approx(stats.chi2.sf(glm.pearson_chi2, df), rel=1e-6) and fit.gof_p < 0.05
    # The two statsmodels fits stop at IRLS's tolerance: they agree to about 1e-7.
    assert fit.heterogeneity_applied and fit.heterogeneity == pytest.approx(glm.scale, rel=1e-5)
    assert fit.slope_se == pytest.approx(glm.bse[1], rel=1e-5)
    assert fit.quantile == pytest.approx(stats.t.ppf(0.975, df))
    assert fit.trend_test.startswith("F on 1 and 4 df") and fit.trend_p < 0.05
    assert "applied: variances ×" in fit.method and "t quantile on 4 df" in fit.method
    binomial = fit_dose_response(SCATTER_DOSE, SCATTER_RESPONDING, SCATTER_N, heterogeneity_level=0.0)
    assert not binomial.heterogeneity_applied
    assert binomial.ec50_upper / binomial.ec50_lower < fit.ec50_upper / fit.ec50_lower


# --- Fieller and profile-likelihood intervals ------------------------------------------------------


def test_fieller_interval_matches_collett_closed_form():
    fit = fit_dose_response(BEETLE_DOSE, BEETLE_KILLED, BEETLE_N, link="logit")
    x = np.array(BEETLE_LOG10_DOSE)
    (a, b), cov = _newton_logistic(x, np.array(BEETLE_KILLED, float), np.array(BEETLE_N, float))
    z = stats.norm.ppf(0.975)
    low, high = _collett_fieller(a, b, cov[0, 0], cov[1, 1], cov[0, 1], z)
    assert math.log10(fit.ec50_lower) == pytest.approx(low, rel=1e-5)
    assert math.log10(fit.ec50_upper) == pytest.approx(high, rel=1e-5)
    # With a steep, well-estimated slope (g small) Fieller and the delta method nearly agree.
    m = -a / b
    delta_half = z * math.sqrt(cov[0, 0] + 2 * m * cov[0, 1] + m**2 * cov[1, 1]) / abs(b)
    assert fit.g == pytest.approx(z**2 * cov[1, 1] / b**2, rel=1e-5) and fit.g < 0.05
    assert (high - low) / 2 == pytest.approx(delta_half, rel=0.05)


def _log_p_and_q(link, eta):
    """log p and log (1 - p) without rounding 1 - p: exact forms of each inverse link."""
    if link == "logit":
        return special.log_expit(eta), special.log_expit(-eta)
    if link == "probit":
        return special.log_ndtr(eta), special.log_ndtr(-eta)
    rate = np.exp(eta)  # cloglog: 1 - p = exp(-e^eta)
    return np.where(eta < -30, eta, np.log(-np.expm1(-rate))), -rate


def _loglik(link, eta, y, n):
    log_p, log_q = _log_p_and_q(link, np.asarray(eta, float))
    return float(np.sum(y * log_p + (n - y) * log_q))


def _profile_limits(link, doses, y, n, scale=1.0, q=None, step=0.05):
    """Independent profile-likelihood limits for log10 EC50: Nelder-Mead for the best fit, Brent for the slope
    at each fixed EC50 (the log-likelihood is concave in it for these links), a scan outward in steps of
    ``step`` decades to the first crossing, then brentq."""
    x, y, n = np.log10(doses), np.asarray(y, float), np.asarray(n, float)
    best = optimize.minimize(lambda ab: -_loglik(link, ab[0] + ab[1] * x, y, n), x0=[0.0, 1.0], method="Nelder-Mead",
                             options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 20000, "maxfev": 40000})
    a, b = best.x
    m_hat = (ETA50[link] - a) / b
    crit = (q or stats.norm.ppf(0.975)) ** 2 * scale

    def excess(m):
        inner = optimize.minimize_scalar(lambda s: -_loglik(link, ETA50[link] + s * (x - m), y, n), method="brent")
        return 2 * (-best.fun + inner.fun) - crit

    limits = []
    for direction in (-1, 1):
        m = m_hat
        while excess(m + direction * step) <= 0:
            m += direction * step
        limits.append(optimize.brentq(excess, *sorted((m, m + direction * step)), xtol=1e-10))
    return m_hat, limits


@pytest.mark.parametrize(("responding", "link"), [([1, 3, 4], "logit"), ([1, 4, 5], "cloglog"), ([0, 1, 3], "probit")])
def test_profile_likelihood_interval_where_fieller_is_unbounded_matches_an_independent_computation(responding, link):
    # Five dishes at each of three doses: a trend (likelihood ratio) that the Wald slope test misses, g >= 1.
    doses, n = [1.0, 10.0, 100.0], [5, 5, 5]
    fit = fit_dose_response(doses, responding, n)
    assert (fit.status, fit.link, fit.interval_method) == ("ec50", link, "profile")
    assert fit.g >= 1 and fit.trend_p < 0.05 and "profile likelihood" in fit.method
    m_hat, (low, high) = _profile_limits(link, doses, responding, n)
    assert math.log10(fit.ec50) == pytest.approx(m_hat, abs=1e-5)
    assert (math.log10(fit.ec50_lower), math.log10(fit.ec50_upper)) == pytest.approx((low, high), abs=1e-4)
    assert fit.ec50_lower < fit.ec50 < fit.ec50_upper


def test_profile_interval_with_the_heterogeneity_factor_matches_an_independent_computation():
    doses, n, responding = [1, 2, 4, 8, 16, 32], [10] * 6, [0, 7, 3, 9, 10, 10]  # invented, scattered
    fit = fit_dose_response(doses, responding, n)
    assert (fit.link, fit.interval_method, fit.heterogeneity_applied) == ("cloglog", "profile", True)
    x, y, nn = np.log10(doses), np.array(responding, float), np.array(n, float)
    p = INVERSE["cloglog"](fit.intercept + fit.slope * x)
    factor = float(np.sum((y - nn * p) ** 2 / (nn * p * (1 - p)))) / 4  # Pearson X^2 / df by hand
    assert fit.heterogeneity == pytest.approx(factor, rel=1e-6)
    _, (low, high) = _profile_limits("cloglog", doses, responding, n, scale=factor, q=stats.t.ppf(0.975, 4))
    assert (math.log10(fit.ec50_lower), math.log10(fit.ec50_upper)) == pytest.approx((low, high), abs=1e-4)


# --- Flat and nearly flat responses: "no dose trend" ----------------------------------------------


def test_flat_response_is_no_dose_trend_not_a_division_by_zero():
    # The same fraction at every dose makes the fitted slope exactly 0 (the study page used to crash).
    fit = fit_dose_response([1, 10, 100], [5, 5, 5], [10, 10, 10])
    assert fit.status == "no_trend" and not fit.has_ec50
    assert fit.slope == 0.0 and fit.trend_p == pytest.approx(1.0)
    assert (fit.ec50, fit.ec50_lower, fit.ec50_upper, fit.interval_method) == (None, None, None, "")
    assert fit.reason.startswith("No dose trend") and "no EC50" in fit.reason


def test_nearly_flat_response_is_no_dose_trend_by_the_likelihood_ratio_test():
    fit = fit_dose_response([1, 10, 100], [4, 6, 5], [10, 10, 10])
    glm = _glm(fit.link, [0, 1, 2], [4, 6, 5], [10, 10, 10])
    drop = glm.null_deviance - glm.deviance
    assert fit.trend_statistic == pytest.approx(drop, rel=1e-8)
    assert fit.trend_p == pytest.approx(stats.chi2.sf(drop, 1), rel=1e-8) and fit.trend_p >= 0.05
    assert fit.status == "no_trend" and fit.ec50 is None
    assert "likelihood-ratio" in fit.reason and "0.05" in fit.reason


@pytest.mark.parametrize(("responding", "words"), [([0, 0, 0], "none responded at any dose (0 of 30)"),
                                                    ([10, 10, 10], "all responded at every dose (30 of 30)")])
def test_no_response_or_full_response_everywhere_is_no_dose_trend(responding, words):
    fit = fit_dose_response([1, 2, 3], responding, [10, 10, 10])
    assert fit.status == "no_trend" and words in fit.reason
    assert fit.links == () and fit.link is None
    with pytest.raises(ValueError, match="no curve was fitted"):
        fit.predict(1.0)


def test_a_trend_whose_ec50_is_beyond_any_dose_is_not_given_as_a_number():
    # 10^12 animals a dose with a real but tiny slope: the curve would reach 50 % near 10^321.
    x = np.array([0.0, 1.0, 2.0])
    n = 10**12
    responding = np.round(n * special.expit(-10 + 0.03 * x))
    fit = fit_dose_response(10**x, responding, [n] * 3)
    assert fit.status == "beyond_range" and fit.trend_p < 0.05 and fit.ec50 is None
    assert "beyond any dose" in fit.reason


def test_an_ec50_outside_the_doses_tested_is_marked_extrapolated():
    fit = fit_dose_response([1, 10, 100], [20, 28, 34], [100, 100, 100])
    assert fit.status == "ec50" and fit.ec50 > 100 and fit.extrapolated
    assert not fit_dose_response(BEETLE_DOSE, BEETLE_KILLED, BEETLE_N).extrapolated


# --- Separation ------------------------------------------------------------------------------------


@pytest.mark.parametrize(("doses", "responding", "words"), [
    ([1, 2, 3, 4], [0, 0, 10, 10], "Complete separation: none responded at 2 or below and all at 3 or above"),
    ([1, 2, 3, 4], [10, 10, 0, 0], "Complete separation: all responded at 2 or below and none at 3 or above"),
    ([1, 2, 3], [0, 4, 10], "Quasi-complete separation: none responded below 2 and all responded above it; "
                            "at 2, 4 of 10 responded"),
    ([1, 2, 3], [0, 0, 1], "Quasi-complete separation: none responded below 3; at 3, 1 of 10 responded"),
])
def test_separation_is_reported_with_where_the_response_jumps_and_no_ec50(doses, responding, words):
    fit = fit_dose_response(doses, responding, [10] * len(doses))
    assert fit.status == "separation" and words in fit.reason
    assert "slope is infinite" in fit.reason and fit.ec50 is None and fit.links == ()


def test_separated_data_drive_statsmodels_to_an_absurd_slope():
    # Why separation is caught before fitting: left to itself the fit runs off towards an infinite slope.
    with pytest.warns(Warning):
        glm = _glm("logit", [0, 0.30103, 0.47712, 0.60206], [0, 0, 10, 10], [10] * 4)
    assert abs(glm.params[1]) > 50 or not glm.converged


def test_overlap_at_two_doses_is_not_separation():
    fit = fit_dose_response([1, 2, 3, 4], [0, 3, 7, 10], [10] * 4)
    assert fit.status == "ec50" and fit.ec50_lower < fit.ec50 < fit.ec50_upper


@settings(max_examples=60, deadline=None, derandomize=True)
@given(st.lists(st.tuples(st.integers(0, 6), st.integers(1, 6)), min_size=3, max_size=5))
def test_any_small_dataset_gives_a_finite_bounded_result_or_no_ec50(groups):
    # common practice: whatever dishes a study has, the fit never crashes or gives an unbounded EC50.
    responding = [min(r, n) for r, n in groups]
    totals = [n for _, n in groups]
    doses = [2.0**i for i in range(len(groups))]
    fit = fit_dose_response(doses, responding, totals)
    if fit.status == "ec50":
        assert fit.trend_p < 0.05
        assert all(map(math.isfinite, (fit.ec50, fit.ec50_lower, fit.ec50_upper)))
        assert fit.ec50_lower < fit.ec50 < fit.ec50_upper
    else:
        assert fit.ec50 is None and fit.reason


# --- Prediction, immutability, bad input -----------------------------------------------------------


def test_predict_gives_one_half_at_ec50_and_follows_the_curve():
    fit = fit_dose_response(BEETLE_DOSE, BEETLE_KILLED, BEETLE_N, link="logit")
    assert fit.predict(fit.ec50) == pytest.approx(0.5)
    assert fit.predict(0) == 0.0
    expected = 1 / (1 + math.exp(-(fit.intercept + fit.slope * 1.8113)))
    assert fit.predict(10**1.8113) == pytest.approx(expected)
    curve = fit.predict(BEETLE_DOSE)
    assert isinstance(curve, np.ndarray) and np.all(np.diff(curve) > 0)
    with pytest.raises(ValueError, match="dose"):
        fit.predict(-1)


def test_fit_is_frozen():
    fit = fit_dose_response(BEETLE_DOSE, BEETLE_KILLED, BEETLE_N)
    assert isinstance(fit, DoseResponseFit)
    with pytest.raises(dataclasses.FrozenInstanceError):
        fit.ec50 = 1.0  # type: ignore[misc]


def test_decreasing_response_gives_negative_slope():
    fit = fit_dose_response([1, 3, 10, 30], [18, 12, 7, 2], [20, 20, 20, 20])
    assert fit.slope < 0 and fit.predict(0) == 1.0
    assert fit.predict(fit.ec50) == pytest.approx(0.5)


@pytest.mark.parametrize(
    ("doses", "responding", "total", "message"),
    [
        ([1, 2, 3], [1, 2], [10, 10, 10], "same length"),
        ([1, 2, 3], [1, 12, 5], [10, 10, 10], "exceeds n_total"),
        ([1, -2, 3], [1, 2, 3], [10, 10, 10], "negative"),
        ([1, 2, 3], [1, -2, 3], [10, 10, 10], "negative"),
        ([0, 1, 2, 3], [0, 1, 5, 9], [10, 10, 10, 10], "control"),
        ([1, 2], [2, 8], [10, 10], "at least 3"),
        ([1, 1, 2, 2], [2, 3, 7, 8], [10, 10, 10, 10], "at least 3"),
        ([1, 2, 3], [1.5, 2, 3], [10, 10, 10], "whole numbers"),
        ([1, 2, 3], [1, 2, 3], [10, 0, 10], "n_total >= 1"),
        ([1, float("nan"), 3], [1, 2, 3], [10, 10, 10], "finite"),
    ],
)
def test_dose_response_rejects_bad_input(doses, responding, total, message):
    with pytest.raises(ValueError, match=message):
        fit_dose_response(doses, responding, total)


def test_unknown_link_is_refused_naming_the_choices():
    with pytest.raises(ValueError, match="link must be one of logit, probit, cloglog: got 'weibull'"):
        fit_dose_response(BEETLE_DOSE, BEETLE_KILLED, BEETLE_N, link="weibull")
