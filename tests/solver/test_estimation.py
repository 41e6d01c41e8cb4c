"""Demand and replenishment estimation: statistical behaviour on simulated history, outside
references (scipy.stats and scipy.optimize on textbook likelihoods written here, closed forms),
exact properties of the weighted likelihood, and input checking.

Simulated histories come from `_history` below (our own seeded generator): true daily demand is
drawn, stock at open is drawn so that stock-outs are frequent, and sales are demand capped at
stock. Scenarios and numbers are our own.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pytest
from numpy.testing import assert_allclose
from numpy.typing import NDArray
from scipy import optimize, stats

from solver import NetworkSpec
from solver.estimation import (
    CalibrationError,
    CountEstimate,
    calibrate_location,
    estimate_demand,
    estimate_replenishment,
    recency_weights,
    weekday_effect,
)

Draw = Callable[[np.random.Generator, int], NDArray[np.int64]]


def _poisson(mean: float) -> Draw:
    return lambda rng, n: rng.poisson(mean, n)


def _negative_binomial(mean: float, variance: float) -> Draw:
    # numpy counts failures before n successes with success probability p, as scipy's nbinom
    # does (scipy.stats.nbinom documentation): n = mu^2 / (v - mu), p = mu / v give mean mu and
    # variance v.
    return lambda rng, n: rng.negative_binomial(mean * mean / (variance - mean), mean / variance, n)


@dataclass(frozen=True)
class History:
    demand: NDArray[np.int64]
    stock: NDArray[np.int64]
    sold: NDArray[np.int64]


def _history(
    rng: np.random.Generator,
    n_days: int,
    draw: Draw,
    *,
    stock_low: int,
    stock_high: int,
    empty_share: float = 0.05,
) -> History:
    """Daily demand from `draw`; stock at open uniform on stock_low..stock_high, and 0 on about
    `empty_share` of the days; sales are demand capped at stock."""
    demand = draw(rng, n_days)
    stock = rng.integers(stock_low, stock_high + 1, n_days)
    stock[rng.random(n_days) < empty_share] = 0
    return History(demand, stock, np.minimum(demand, stock))


def _binomial_band(n: int, p: float, level: float = 0.999) -> tuple[float, float]:
    """Central `level` band of a binomial(n, p) count, as a proportion (scipy.stats.binom)."""
    tail = (1.0 - level) / 2.0
    law = stats.binom(n, p)
    return float(law.ppf(tail)) / n, float(law.isf(tail)) / n


def _covers(interval: tuple[float, float], value: float) -> bool:
    return interval[0] <= value <= interval[1]


# -- censored Poisson demand: coverage, bias of the plain average, false overdispersion ------

POISSON_MEAN = 6.0
POISSON_SEEDS = 400
POISSON_DAYS = 120


@dataclass(frozen=True)
class PoissonRuns:
    covered: NDArray[np.bool_]
    naive_means: NDArray[np.float64]
    naive_covered: NDArray[np.bool_]
    negative_binomial_chosen: NDArray[np.bool_]
    sold_out_share: float


@pytest.fixture(scope="module")
def poisson_runs() -> PoissonRuns:
    """Hardware store, drill-bit sets: Poisson demand of 6 a day, stock at open 2..9."""
    covered, naive, naive_covered, chosen, sold_out = [], [], [], [], []
    z = stats.norm.isf(0.025)
    for seed in range(POISSON_SEEDS):
        h = _history(
            np.random.default_rng(seed),
            POISSON_DAYS,
            _poisson(POISSON_MEAN),
            stock_low=2,
            stock_high=9,
        )
        estimate = estimate_demand(h.sold, h.stock)
        covered.append(_covers(estimate.mean_interval, POISSON_MEAN))
        naive.append(estimate.naive_mean)
        # The plain interval an analyst would draw: mean +- 1.96 sqrt(mean / days with stock).
        days = int(np.count_nonzero(h.stock > 0))
        half = z * np.sqrt(estimate.naive_mean / days)
        naive_covered.append(abs(estimate.naive_mean - POISSON_MEAN) <= half)
        chosen.append(estimate.family == "negative_binomial")
        with_stock = h.stock > 0
        sold_out.append(np.mean(h.sold[with_stock] == h.stock[with_stock]))
    return PoissonRuns(
        np.array(covered),
        np.array(naive),
        np.array(naive_covered),
        np.array(chosen),
        float(np.mean(sold_out)),
    )


def test_simulated_poisson_history_sells_out_often(poisson_runs: PoissonRuns) -> None:
    # The scenario is the hard case the estimator exists for.
    assert poisson_runs.sold_out_share > 0.4


def test_censored_poisson_interval_covers_the_true_mean_at_the_nominal_rate(
    poisson_runs: PoissonRuns,
) -> None:
    # Profile-likelihood intervals have asymptotically nominal coverage (Wilks' theorem). With 400
    # seeds the observed rate must lie in the central 99.9% band of binomial(400, 0.95), about
    # 0.913 to 0.985.
    lo, hi = _binomial_band(POISSON_SEEDS, 0.95)
    assert lo <= poisson_runs.covered.mean() <= hi


def test_plain_average_is_biased_low_when_stock_runs_out(poisson_runs: PoissonRuns) -> None:
    # Sales are min(D, stock) <= D, so their average underestimates E D; with a sold-out share
    # above 40% the shortfall is large. The plain interval then rarely contains the truth.
    assert poisson_runs.naive_means.mean() < 0.85 * POISSON_MEAN
    assert poisson_runs.naive_covered.mean() < 0.2
    assert poisson_runs.naive_covered.mean() < poisson_runs.covered.mean() - 0.5


def test_poisson_history_is_called_overdispersed_about_alpha_of_the_time(
    poisson_runs: PoissonRuns,
) -> None:
    # Under the Poisson the boundary likelihood-ratio test rejects with probability alpha (Self
    # and Liang 1987, chi-bar-squared null; from memory). Central 99.9% band of binomial(400,
    # 0.05): about 0.020 to 0.090.
    lo, hi = _binomial_band(POISSON_SEEDS, 0.05)
    assert lo <= poisson_runs.negative_binomial_chosen.mean() <= hi


# -- censored negative binomial demand -------------------------------------------------------

NB_MEAN, NB_VARIANCE = 5.0, 15.0
NB_SEEDS = 120
NB_DAYS = 200


@pytest.fixture(scope="module")
def negative_binomial_runs() -> list[CountEstimate]:
    """Garden centre, hose reels: bursty demand of mean 5 and variance 15, stock at open 2..10."""
    return [
        estimate_demand(h.sold, h.stock)
        for h in (
            _history(
                np.random.default_rng(10_000 + seed),
                NB_DAYS,
                _negative_binomial(NB_MEAN, NB_VARIANCE),
                stock_low=2,
                stock_high=10,
            )
            for seed in range(NB_SEEDS)
        )
    ]


def test_overdispersed_history_is_recognised(negative_binomial_runs: list[CountEstimate]) -> None:
    chosen = np.mean([e.family == "negative_binomial" for e in negative_binomial_runs])
    assert chosen >= 0.9
    for estimate in negative_binomial_runs:
        if estimate.family == "negative_binomial":
            assert estimate.variance > estimate.mean
            assert estimate.variance_interval is not None
            assert estimate.p_value < 0.05
            assert estimate.selection.startswith("negative binomial: likelihood-ratio test")


def test_negative_binomial_interval_covers_the_true_mean_at_the_nominal_rate(
    negative_binomial_runs: list[CountEstimate],
) -> None:
    # Central 99.9% band of binomial(120, 0.95): about 0.88 to 0.99 (profile likelihood over
    # the dispersion; Wilks' theorem).
    lo, hi = _binomial_band(NB_SEEDS, 0.95)
    covered = [_covers(e.mean_interval, NB_MEAN) for e in negative_binomial_runs]
    assert lo <= np.mean(covered) <= hi
    variance_covered = [
        _covers(e.variance_interval, NB_VARIANCE)
        for e in negative_binomial_runs
        if e.variance_interval is not None
    ]
    lo, hi = _binomial_band(len(variance_covered), 0.95)
    assert lo <= np.mean(variance_covered) <= hi


# -- outside references on fixed data -------------------------------------------------------


def _split(h: History) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """Sales on uncensored days, and sales on sold-out days (days without stock dropped)."""
    with_stock = h.stock > 0
    sold_out = with_stock & (h.sold == h.stock)
    return h.sold[with_stock & ~sold_out], h.sold[sold_out]


def _textbook_poisson_loglik(
    mean: float, exact: NDArray[np.int64], at_least: NDArray[np.int64]
) -> float:
    # Censored likelihood: log P(D = s) for observed demand, log P(D >= s) = logsf(s - 1) for a
    # sold-out day (e.g. Lawless 2003, Statistical Models and Methods for Lifetime Data, ch. 2,
    # for right censoring; from memory), with scipy.stats.poisson.
    return float(
        stats.poisson.logpmf(exact, mean).sum() + stats.poisson.logsf(at_least - 1, mean).sum()
    )


def _textbook_nbinom_loglik(
    mean: float, variance: float, exact: NDArray[np.int64], at_least: NDArray[np.int64]
) -> float:
    # scipy.stats.nbinom(n, p) has mean n (1 - p) / p and variance n (1 - p) / p^2 (scipy docs).
    law = stats.nbinom(mean * mean / (variance - mean), mean / variance)
    return float(law.logpmf(exact).sum() + law.logsf(at_least - 1).sum())


def test_censored_poisson_estimate_matches_scipy_minimize_scalar() -> None:
    h = _history(np.random.default_rng(7), 90, _poisson(4.5), stock_low=1, stock_high=7)
    exact, at_least = _split(h)
    assert at_least.size > 20
    estimate = estimate_demand(h.sold, h.stock)
    assert estimate.family == "poisson"
    # Reference: scipy.optimize.minimize_scalar (bounded Brent) on the textbook likelihood.
    reference = optimize.minimize_scalar(
        lambda m: -_textbook_poisson_loglik(m, exact, at_least),
        bounds=(0.1, 30.0),
        method="bounded",
        options={"xatol": 1e-10},
    )
    assert_allclose(estimate.mean, reference.x, atol=1e-6)
    assert_allclose(estimate.variance, estimate.mean, rtol=0)
    assert_allclose(estimate.log_likelihood_poisson, -reference.fun, atol=1e-8)
    # The interval ends are where the textbook log-likelihood has fallen by chi2_{1,0.95} / 2.
    drop = stats.chi2.ppf(0.95, 1) / 2.0
    for end in estimate.mean_interval:
        assert_allclose(
            -reference.fun - _textbook_poisson_loglik(end, exact, at_least), drop, atol=1e-6
        )
    assert estimate.distribution().model_dump() == {"dist": "poisson", "mean": estimate.mean}


def test_censored_negative_binomial_estimate_matches_scipy_minimize() -> None:
    h = _history(
        np.random.default_rng(11),
        300,
        _negative_binomial(6.0, 20.0),
        stock_low=3,
        stock_high=14,
    )
    exact, at_least = _split(h)
    assert at_least.size > 50
    estimate = estimate_demand(h.sold, h.stock)
    assert estimate.family == "negative_binomial"

    # Reference: scipy.optimize.minimize (Nelder-Mead) on the textbook likelihood, over
    # (log mean, log(variance - mean)) so that every trial point is a valid law.
    def negative(theta: NDArray[np.float64]) -> float:
        mean = float(np.exp(theta[0]))
        return -_textbook_nbinom_loglik(mean, mean + float(np.exp(theta[1])), exact, at_least)

    reference = optimize.minimize(
        negative,
        x0=np.log([5.0, 10.0]),
        method="Nelder-Mead",
        options={"xatol": 1e-11, "fatol": 1e-13, "maxiter": 20_000, "maxfev": 40_000},
    )
    assert reference.success
    mean = float(np.exp(reference.x[0]))
    variance = mean + float(np.exp(reference.x[1]))
    assert_allclose(estimate.mean, mean, rtol=1e-5)
    assert_allclose(estimate.variance, variance, rtol=1e-5)
    assert estimate.log_likelihood_negative_binomial is not None
    assert_allclose(estimate.log_likelihood_negative_binomial, -reference.fun, atol=1e-7)
    # The Poisson maximum of the same data, against minimize_scalar.
    poisson = optimize.minimize_scalar(
        lambda m: -_textbook_poisson_loglik(m, exact, at_least),
        bounds=(0.1, 40.0),
        method="bounded",
        options={"xatol": 1e-10},
    )
    assert_allclose(estimate.log_likelihood_poisson, -poisson.fun, atol=1e-7)
    # Chi-bar-squared p-value 0.5 P(chi2_1 > LR) (Self and Liang 1987; from memory).
    statistic = 2.0 * (-reference.fun + poisson.fun)
    assert_allclose(estimate.p_value, 0.5 * stats.chi2.sf(statistic, 1), rtol=1e-4)
    # Profile-likelihood ends: the textbook likelihood maximised over the variance at a fixed
    # mean has fallen by chi2_{1,0.95} / 2.
    drop = stats.chi2.ppf(0.95, 1) / 2.0
    for end in estimate.mean_interval:
        best = optimize.minimize_scalar(
            lambda log_excess, m=end: (
                -_textbook_nbinom_loglik(m, m + np.exp(log_excess), exact, at_least)
            ),
            bounds=(-10.0, 8.0),
            method="bounded",
            options={"xatol": 1e-10},
        )
        assert_allclose(-reference.fun + best.fun, drop, atol=1e-5)
    law = estimate.distribution()
    assert law.model_dump() == {
        "dist": "negative_binomial",
        "mean": estimate.mean,
        "variance": estimate.variance,
    }


def test_uncensored_poisson_estimate_is_the_sample_mean() -> None:
    # Textbook closed form: the Poisson maximum-likelihood mean is the sample mean.
    received = np.random.default_rng(3).poisson(2.7, 365)
    estimate = estimate_replenishment(received)
    assert estimate.family == "poisson"
    assert_allclose(estimate.mean, received.mean(), rtol=1e-13)
    assert_allclose(estimate.naive_mean, received.mean(), rtol=1e-13)
    # The profile interval of an uncensored Poisson mean solves
    # n (m - xbar log m) - n (xbar - xbar log xbar) = chi2_{1,0.95} / 2 (same textbook form).
    drop = stats.chi2.ppf(0.95, 1) / 2.0
    n, xbar = received.size, received.mean()
    for end in estimate.mean_interval:
        fall = n * (end - xbar * np.log(end)) - n * (xbar - xbar * np.log(xbar))
        assert_allclose(fall, drop, atol=1e-7)


def test_uncensored_negative_binomial_mean_is_the_sample_mean_and_matches_scipy_fit() -> None:
    received = _negative_binomial(3.4, 10.5)(np.random.default_rng(5), 730)
    estimate = estimate_replenishment(received)
    assert estimate.family == "negative_binomial"
    # Anscombe (1950), Biometrika 37: the maximum-likelihood negative binomial mean is the
    # sample mean, whatever the shape (from memory).
    assert_allclose(estimate.mean, received.mean(), rtol=1e-12)

    # Reference: scipy.stats.fit (maximum likelihood by seeded differential evolution with its
    # local polish) of nbinom(n, p). scipy.stats.fit treats nbinom's n as a whole number; the
    # optimizer below drops that constraint, since the law is defined for every real n > 0
    # (scipy.stats.nbinom documentation) and our estimate is not restricted either.
    def optimizer(fun: Any, bounds: Any, *, integrality: Any) -> Any:
        return optimize.differential_evolution(fun, bounds, rng=np.random.default_rng(0), tol=1e-12)

    fit = stats.fit(
        stats.nbinom, received, bounds={"n": (0.05, 100.0), "p": (0.01, 0.99)}, optimizer=optimizer
    )
    n, p = fit.params.n, fit.params.p
    # Tolerance 1e-5 relative: the polished optimum of a stochastic global search.
    assert_allclose(estimate.mean, n * (1 - p) / p, rtol=1e-5)
    assert_allclose(estimate.variance, n * (1 - p) / p**2, rtol=1e-5)
    # Our maximum is at least as high as scipy's.
    assert estimate.log_likelihood_negative_binomial is not None
    assert estimate.log_likelihood_negative_binomial >= -fit.nllf() - 1e-9


def test_all_zero_receipts_give_a_zero_mean_with_a_closed_form_upper_end() -> None:
    # l(m) = -n m for n zero counts, so the profile interval is [0, chi2_{1,0.95} / (2 n)].
    estimate = estimate_replenishment(np.zeros(50, dtype=int))
    assert estimate.mean == 0.0
    assert estimate.log_likelihood_negative_binomial is None
    assert_allclose(estimate.mean_interval, (0.0, stats.chi2.ppf(0.95, 1) / 100.0), rtol=1e-12)


# -- weights --------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("draw", "family"),
    [(_poisson(3.3), "poisson"), (_negative_binomial(4.4, 16.0), "negative_binomial")],
)
def test_integer_weights_estimate_as_repeated_rows(draw: Draw, family: str) -> None:
    # The weighted log-likelihood with integer weights is the log-likelihood of the repeated rows
    # (exact), so the maximum is the same; intervals differ by design (Kish scaling).
    rng = np.random.default_rng(21)
    h = _history(rng, 250, draw, stock_low=1, stock_high=9)
    weights = rng.integers(1, 4, h.sold.size)
    weighted = estimate_demand(h.sold, h.stock, weights=weights)
    repeated = estimate_demand(np.repeat(h.sold, weights), np.repeat(h.stock, weights))
    assert weighted.family == repeated.family == family
    assert_allclose(weighted.mean, repeated.mean, rtol=1e-9)
    assert_allclose(weighted.variance, repeated.variance, rtol=1e-7)
    assert_allclose(weighted.naive_mean, repeated.naive_mean, rtol=1e-12)


def test_constant_weights_change_nothing_and_zero_weights_drop_rows() -> None:
    # Kish's n_eff of constant weights is the number of days, so the scaled likelihood, and with
    # it every interval and test, is that of unit weights.
    rng = np.random.default_rng(8)
    h = _history(rng, 160, _negative_binomial(5.0, 14.0), stock_low=2, stock_high=10)
    plain = estimate_demand(h.sold, h.stock)
    constant = estimate_demand(h.sold, h.stock, weights=np.full(h.sold.size, 3.5))
    assert constant.family == plain.family
    assert_allclose(constant.mean_interval, plain.mean_interval, rtol=1e-8)
    assert_allclose(constant.p_value, plain.p_value, rtol=1e-8)
    keep = rng.random(h.sold.size) < 0.7
    dropped = estimate_demand(h.sold[keep], h.stock[keep])
    zeroed = estimate_demand(h.sold, h.stock, weights=keep.astype(float))
    assert_allclose(zeroed.mean, dropped.mean, rtol=1e-10)
    assert_allclose(zeroed.mean_interval, dropped.mean_interval, rtol=1e-8)


def test_days_without_stock_change_nothing() -> None:
    rng = np.random.default_rng(9)
    h = _history(rng, 120, _poisson(4.8), stock_low=1, stock_high=8, empty_share=0.0)
    base = estimate_demand(h.sold, h.stock)
    padded = estimate_demand(
        np.concatenate([h.sold, np.zeros(40, dtype=int)]),
        np.concatenate([h.stock, np.zeros(40, dtype=int)]),
        weights=np.concatenate([np.ones(h.sold.size), rng.random(40)]),
    )
    assert padded == base


def test_weighted_log_likelihood_is_scaled_by_kish_effective_sample_size() -> None:
    # Kish (1965), Survey Sampling: n_eff = (sum w)^2 / sum w^2 (from memory). The reported
    # log-likelihood is n_eff / sum w times the weighted one, evaluated here with scipy.stats.
    received = np.random.default_rng(12).poisson(2.2, 200)
    weights = recency_weights(np.arange(199, -1, -1), 60.0)
    estimate = estimate_replenishment(received, weights=weights)
    assert estimate.family == "poisson"
    n_eff = weights.sum() ** 2 / np.sum(weights**2)
    assert_allclose(estimate.effective_days, n_eff, rtol=1e-12)
    assert_allclose(estimate.mean, np.dot(weights, received) / weights.sum(), rtol=1e-12)
    weighted = np.dot(weights, stats.poisson.logpmf(received, estimate.mean))
    assert_allclose(estimate.log_likelihood_poisson, n_eff / weights.sum() * weighted, rtol=1e-10)


def test_recency_weights_halve_every_half_life() -> None:
    assert_allclose(recency_weights([0, 7, 14, 3.5], 7.0), [1.0, 0.5, 0.25, 2**-0.5], rtol=1e-15)
    with pytest.raises(ValueError, match="half_life_days"):
        recency_weights([0, 1], 0.0)
    with pytest.raises(ValueError, match="row 1: age_days"):
        recency_weights([0, -1], 7.0)


def test_explicit_ages_give_the_same_weights_as_rows_in_date_order() -> None:
    # Weights depend on each day's age, not on the order of the rows: shuffled rows with their
    # ages give exactly the estimate of rows in date order with the default ages.
    rng = np.random.default_rng(14)
    h = _history(rng, 120, _poisson(4.8), stock_low=1, stock_high=8)
    received = rng.poisson(3.7, 120)
    in_order = calibrate_location(h.sold, h.stock, received, half_life_days=30.0)
    order = rng.permutation(120)
    ages = np.arange(119, -1, -1)[order]
    shuffled = calibrate_location(
        h.sold[order], h.stock[order], received[order], age_days=ages, half_life_days=30.0
    )
    assert_allclose(shuffled.demand.mean, in_order.demand.mean, rtol=1e-12)
    assert_allclose(shuffled.demand.mean_interval, in_order.demand.mean_interval, rtol=1e-9)
    assert_allclose(shuffled.replenishment.mean, in_order.replenishment.mean, rtol=1e-12)
    # Without a half-life the ages are checked but do not weight anything.
    unweighted = calibrate_location(h.sold, h.stock, received, age_days=np.arange(120))
    assert unweighted == calibrate_location(h.sold, h.stock, received)
    with pytest.raises(ValueError, match="row 2: age_days is NaN"):
        calibrate_location(h.sold[:3], h.stock[:3], received[:3], age_days=[0, 1, np.nan])


def test_half_life_weighting_tracks_a_recent_shift_in_demand() -> None:
    # Hardware store, tile cutters: demand of 2.8 a day for 300 days, then 7.5 a day for the
    # last 45.
    for seed in range(10):
        rng = np.random.default_rng(500 + seed)
        demand = np.concatenate([rng.poisson(2.8, 300), rng.poisson(7.5, 45)])
        stock = rng.integers(3, 14, demand.size)
        sold = np.minimum(demand, stock)
        received = rng.poisson(5.2, demand.size)
        plain = calibrate_location(sold, stock, received)
        recent = calibrate_location(sold, stock, received, half_life_days=10.0)
        assert abs(recent.demand.mean - 7.5) < abs(plain.demand.mean - 7.5)
        assert abs(recent.demand.mean - 7.5) < 2.0
        assert not _covers(plain.demand.mean_interval, 7.5)
        assert recent.demand.effective_days < 45


# -- location calibration and warnings -------------------------------------------------------


def test_location_calibration_counts_days_and_builds_a_network() -> None:
    rng = np.random.default_rng(31)
    h = _history(rng, 180, _poisson(3.6), stock_low=2, stock_high=9)
    received = rng.poisson(3.3, 180)
    calibration = calibrate_location(h.sold, h.stock, received)
    with_stock = h.stock > 0
    assert calibration.days == 180
    assert calibration.days_without_stock == int(np.count_nonzero(~with_stock))
    assert calibration.censored_days == int(np.count_nonzero(with_stock & (h.sold == h.stock)))
    assert calibration.warnings == ()
    # Two calibrated hardware stores sharing a drill kit: the laws slot into a network.
    location = {
        "capacity": 15,
        "unit_margin": 18.0,
        "demand": calibration.demand.distribution().model_dump(),
        "replenishment": calibration.replenishment.distribution().model_dump(),
    }
    spec = NetworkSpec.model_validate(
        {
            "name": "Drill kits: Millbrook and Ashcroft",
            "locations": [{"id": "millbrook", **location}, {"id": "ashcroft", **location}],
            "lanes": [{"from": "millbrook", "to": "ashcroft", "unit_cost": 2.5, "max_units": 4}],
        }
    )
    assert spec.locations[0].demand == calibration.demand.distribution()


def test_short_mostly_sold_out_history_warns() -> None:
    sold = np.array([1, 0, 2, 2, 1, 1, 1, 1, 2, 1])
    stock = np.array([1, 3, 2, 2, 1, 4, 1, 1, 2, 1])
    calibration = calibrate_location(sold, stock, np.full(10, 5))
    assert calibration.censored_days == 8
    text = " ".join(calibration.warnings)
    assert "Only 10 days of history (fewer than 28)" in text
    assert "8 of 10 days with stock sold out" in text
    assert "rely heavily on the censoring model" in text
    assert "demand interval" in text and "is wide" in text
    assert all(w.endswith(".") for w in calibration.warnings)


def test_negative_binomial_without_a_finite_maximum_is_not_tested() -> None:
    # Only zero sales below stock, every other day sold out at 1 or 2: along phi = k,
    # mean = (5^k - 1) / k the textbook likelihood (scipy.stats.nbinom) keeps rising towards
    # 2 log 0.2 + 8 log 0.8 without reaching it, so there is no maximum to test against.
    sold = np.array([1, 0, 2, 2, 1, 0, 1, 1, 2, 1])
    stock = np.array([1, 3, 2, 2, 1, 4, 1, 1, 2, 1])
    exact, at_least = _split(History(sold, stock, sold))
    path = []
    for phi in (1.0, 4.0, 16.0):
        mean = (5.0**phi - 1.0) / phi
        law = stats.nbinom(1.0 / phi, 1.0 / (1.0 + phi * mean))
        path.append(float(law.logpmf(exact).sum() + law.logsf(at_least - 1).sum()))
    assert path[0] < path[1] < path[2] < 2 * np.log(0.2) + 8 * np.log(0.8)
    estimate = estimate_demand(sold, stock)
    assert estimate.family == "poisson"
    assert estimate.log_likelihood_negative_binomial is None
    assert "no finite maximum" in estimate.selection


def test_all_sold_out_history_cannot_be_estimated() -> None:
    with pytest.raises(CalibrationError, match=r"every day with stock sold out.*at least 4\.5"):
        estimate_demand([4, 5, 0], [4, 5, 0])
    with pytest.raises(CalibrationError, match="no day with stock"):
        estimate_demand([0, 0], [0, 0])
    with pytest.raises(CalibrationError, match="no day of receipts"):
        estimate_replenishment([])


@pytest.mark.parametrize(
    ("sold", "stock", "weights", "message"),
    [
        ([1, 2], [3], None, "stock_at_open has 1 rows but sold has 2"),
        ([1, -2, 1], [3, 3, 3], None, "row 1: sold = -2 is negative"),
        ([1, 2.5, 1], [3, 3, 3], None, "row 1: sold = 2.5 is not a whole number"),
        ([1, 2, 1], [3, 3, np.nan], None, "row 2: stock_at_open is NaN"),
        ([1, 4, 1], [3, 3, 3], None, "row 1: sold = 4 exceeds stock_at_open = 3"),
        ([1, 2, 1], [3, 3, 3], [1.0, -0.5, 1.0], "row 1: weights = -0.5"),
        ([1, 2, 1], [3, 3, 3], [1.0, 1.0, np.nan], "row 2: weights is NaN"),
        ([1, 200_000, 1], [3, 200_000, 3], None, "row 1: sold = 200000 exceeds 100,000 units"),
        # The lowest offending row wins, whichever field it is in.
        ([1, 2, 9], [3, np.inf, 3], None, "row 1: stock_at_open is inf"),
    ],
)
def test_bad_input_names_the_row_and_field(
    sold: list[float], stock: list[float], weights: list[float] | None, message: str
) -> None:
    with pytest.raises(ValueError, match=message.replace(".", r"\.")) as caught:
        estimate_demand(sold, stock, weights=weights)
    assert not isinstance(caught.value, CalibrationError)


# -- weekday effects ------------------------------------------------------------------------


def _weekday_history(
    rng: np.random.Generator, weeks: int, means: list[float]
) -> tuple[History, NDArray[np.int64]]:
    weekday = np.tile(np.arange(7), weeks)
    demand = rng.poisson(np.asarray(means)[weekday])
    stock = rng.integers(2, 13, weekday.size)
    stock[rng.random(weekday.size) < 0.03] = 0
    return History(demand, stock, np.minimum(demand, stock)), weekday


WEEKEND_MEANS = [3.0, 3.0, 3.5, 3.5, 5.0, 9.0, 8.0]
WEEKEND_SEEDS = 30


def test_weekend_peak_is_significant_and_weekday_means_cover_the_truth() -> None:
    covered = []
    for seed in range(WEEKEND_SEEDS):
        h, weekday = _weekday_history(np.random.default_rng(700 + seed), 40, WEEKEND_MEANS)
        effect = weekday_effect(h.sold, h.stock, weekday)
        assert effect.significant and effect.p_value < 1e-6
        assert effect.df == 6
        assert len(effect.weekdays) == 7
        covered += [
            _covers(e.mean_interval, m) for e, m in zip(effect.weekdays, WEEKEND_MEANS, strict=True)
        ]
    lo, hi = _binomial_band(len(covered), 0.95)
    assert lo <= np.mean(covered) <= hi


FLAT_SEEDS = 160


def test_flat_weekdays_are_significant_about_alpha_of_the_time() -> None:
    # Under equal means the statistic is asymptotically chi2 with 6 df. Central 99.9% band of
    # binomial(160, 0.05): about 0.006 to 0.113.
    significant = []
    for seed in range(FLAT_SEEDS):
        h, weekday = _weekday_history(np.random.default_rng(900 + seed), 30, [5.0] * 7)
        significant.append(weekday_effect(h.sold, h.stock, weekday).significant)
    lo, hi = _binomial_band(FLAT_SEEDS, 0.05)
    assert lo <= np.mean(significant) <= hi


def test_uncensored_poisson_weekday_statistic_matches_the_closed_form() -> None:
    # With stock never running out, the Poisson likelihood-ratio statistic for equal means is
    # 2 sum_d S_d log(ybar_d / ybar), S_d the units sold on weekday d (the G statistic; e.g.
    # Agresti 2013, Categorical Data Analysis; from memory).
    rng = np.random.default_rng(41)
    weekday = np.tile(np.arange(7), 20)
    sold = rng.poisson(np.array([4.2, 4.2, 4.6, 4.3, 5.1, 6.2, 5.7])[weekday])
    stock = sold + 1
    effect = weekday_effect(sold, stock, weekday)
    assert effect.family == "poisson"
    ybar = sold.mean()
    totals = np.bincount(weekday, weights=sold)
    means = totals / np.bincount(weekday)
    assert_allclose(effect.statistic, 2.0 * np.sum(totals * np.log(means / ybar)), rtol=1e-9)
    assert_allclose(effect.p_value, stats.chi2.sf(effect.statistic, 6), rtol=1e-12)
    assert_allclose([e.mean for e in effect.weekdays], means, rtol=1e-12)


def test_weekday_without_stock_is_named() -> None:
    weekday = np.tile(np.arange(7), 6)
    stock = np.where(weekday == 6, 0, 8)
    sold = np.where(weekday == 6, 0, 3)
    with pytest.raises(CalibrationError, match=r"^Sunday: no day with stock"):
        weekday_effect(sold, stock, weekday)
    with pytest.raises(ValueError, match="row 3: weekday = 7"):
        weekday_effect([1, 1, 1, 1], [2, 2, 2, 2], [0, 1, 2, 7])
