"""Daily demand and replenishment laws estimated from a location's sales history.

Each day i of history gives units sold s_i, stock at open a_i and units received r_i. Stock
received during a day is usable from the next day, so a_i is what the day could sell. Demand D_i
is censored by stock: when s_i < a_i the day saw D_i = s_i; when s_i = a_i > 0 it sold out and
only D_i >= s_i is known; when a_i = 0 nothing is known (P(D >= 0) = 1), so such days are counted
but contribute to no estimate. Receipts are always fully observed.

Families. Poisson with mean mu, and the negative binomial with mean mu and variance
v = mu + phi mu^2 (phi > 0; scipy's ``nbinom(n, q)`` with n = 1/phi = mu^2/(v - mu) and
q = mu/v, as in solver/distributions.py). For the negative binomial, with x = phi mu,

    log P(D = s)  = sum_{j<s} log(1 + phi j) + s log mu - log s! - s log(1 + x) - log(1 + x)/phi
    P(D >= s)     = I_p(s, 1/phi),  p = x/(1 + x)       (regularised incomplete beta)

and both reduce to the Poisson as phi -> 0 (P(D >= s) = P(s, mu), the regularised lower
incomplete gamma function), so phi = 0 is the Poisson and one set of formulas serves both.

Censored maximum likelihood. With day weights w_i (1 by default) the weighted log-likelihood is

    l(mu, phi) = sum_{uncensored} w_i log P(D = s_i) + sum_{sold out} w_i log P(D >= s_i).

Identical (s, sold out) pairs are merged with summed weights, so the cost depends on the number of
distinct pairs, not on the length of history. The scores are analytic: dl/dmu in closed form
(d/dmu P(D >= s) = P(D = s-1) (1 + phi (s-1)) / (1 + x)), and dl/dphi through
d/dphi P(D >= s) = -sum_{k<s} P(D = k) d/dphi log P(D = k). For fixed phi the best mu solves the
mu-score (a one-dimensional root; for uncensored data it is the weighted mean, a textbook fact of
both families); phi then solves the profile score, which by the envelope theorem is dl/dphi at
(mu(phi), phi). The Poisson is phi = 0; the negative binomial maximum is on that boundary when
the profile score at phi = 0 is not positive.

Choice of family: the likelihood-ratio statistic LR = 2 (l_nb - l_poisson) tests phi = 0, a
point on the boundary of the parameter space, so its null law is the mixture
0.5 chi2_0 + 0.5 chi2_1 and p = 0.5 P(chi2_1 > LR) for LR > 0, p = 1 for LR = 0 (Self and Liang
1987, J. Amer. Statist. Assoc. 82, 605-610; from memory). The negative binomial is chosen only
when p < alpha.

Intervals are profile-likelihood intervals (chi-square with 1 df): the mean's interval is
{mu : 2 (l_max - max_phi l(mu, phi)) <= chi2_{1,confidence}}, the nuisance phi being maximised
out for the negative binomial (for the Poisson there is none); the negative binomial's variance
interval is the same with v as the parameter and mu maximised out (mu <= v). See Pawitan (2001),
In All Likelihood, ch. 3 and 4 (from memory).

Weights. With weights the estimate maximises the weighted log-likelihood. Recency weights
0.5^(age / half_life) are not frequency weights, so for intervals and tests the log-likelihood is
scaled by n_eff / sum w with Kish's effective sample size n_eff = (sum w)^2 / sum w^2 (Kish 1965,
Survey Sampling; from memory), summed over the days that carry information. Unit weights give
n_eff = n and the plain log-likelihood; any constant weight gives the same intervals as none.

Weekday effects: seven weekday means against one common mean, by a likelihood-ratio test on
chi-square with 6 df (Wilks), the log-likelihoods scaled by the pooled n_eff / sum w. For the
negative binomial the alternative keeps one dispersion phi shared by all weekdays, so the two
models differ only in their means (6 parameters) and the test is about the means; seven separate
dispersions would add 6 more degrees of freedom and mix a dispersion test into it.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize, special, stats

from solver.spec import WEEKDAY_NAMES, NegativeBinomialDemand, PoissonDemand

__all__ = [
    "MAX_DAILY_UNITS",
    "SHORT_HISTORY_DAYS",
    "CalibrationError",
    "CountEstimate",
    "Family",
    "LocationCalibration",
    "WeekdayEffect",
    "calibrate_location",
    "estimate_demand",
    "estimate_replenishment",
    "recency_weights",
    "weekday_effect",
]

Family = Literal["poisson", "negative_binomial"]

# Project choice: four weeks of history, so that every weekday is seen at least four times.
SHORT_HISTORY_DAYS = 28
# Project choice: an interval whose half-width exceeds half the mean is flagged as wide.
WIDE_INTERVAL_RATIO = 0.5
# Project choice: the largest daily count accepted, the largest stockroom a NetworkSpec allows
# (the likelihood's cost grows with the largest count).
MAX_DAILY_UNITS = 100_000

# A maximum is sought within this factor either side of its starting point.
_SEARCH_RANGE = 1e30
# Interval ends are sought within a factor e^45 (about 3e19) of the estimate.
_MAX_LOG_RANGE = 45.0
# Largest dispersion phi searched: variance = mean + 1e6 mean^2 is beyond any real sales history.
_MAX_PHI = 1e6
# Below this phi * mu, log(1 + x) - x/(1 + x) is summed from its series (no cancellation).
_SERIES_X = 1e-2


class CalibrationError(ValueError):
    """The history cannot identify the law asked for (e.g. every day with stock sold out)."""


# -- results --------------------------------------------------------------------------------


@dataclass(frozen=True)
class CountEstimate:
    """A daily count law estimated by maximum likelihood, with its evidence.

    mean, variance: units per day. mean_interval: profile-likelihood interval at `confidence`
    (its upper end is inf when the history cannot bound it). variance_interval: the negative
    binomial's profile-likelihood interval for the variance; None for the Poisson, whose variance
    is its mean. naive_mean: the weighted average of the observations (for demand, units sold on
    days with stock; biased low when days sell out). log_likelihood_poisson and
    log_likelihood_negative_binomial are the maximised log-likelihoods, scaled by
    n_eff / sum w (equal to the plain log-likelihood for unit weights); the latter is None when
    no negative binomial can be fitted (every observation 0, or a likelihood with no finite
    maximum). p_value: likelihood-ratio test of the Poisson against the negative binomial (1.0
    when no test is possible). selection: one sentence saying which family was chosen and why.
    confidence: the level of the intervals. effective_days: Kish's n_eff of the days that carry
    information.
    """

    family: Family
    mean: float
    mean_interval: tuple[float, float]
    variance: float
    variance_interval: tuple[float, float] | None
    naive_mean: float
    log_likelihood_poisson: float
    log_likelihood_negative_binomial: float | None
    p_value: float
    selection: str
    confidence: float
    effective_days: float

    def distribution(self) -> PoissonDemand | NegativeBinomialDemand:
        """The estimate as a solver specification law (units per day)."""
        if self.family == "negative_binomial":
            return NegativeBinomialDemand(
                dist="negative_binomial", mean=self.mean, variance=self.variance
            )
        return PoissonDemand(dist="poisson", mean=self.mean)


@dataclass(frozen=True)
class LocationCalibration:
    """Demand and replenishment of one location, with counts of the days behind them.

    days: rows of history; censored_days: days that sold out (sold == stock_at_open > 0);
    days_without_stock: days with stock_at_open == 0 (no information on demand). warnings: one
    plain-English sentence per concern, empty when there is none.
    """

    days: int
    censored_days: int
    days_without_stock: int
    demand: CountEstimate
    replenishment: CountEstimate
    warnings: tuple[str, ...]


@dataclass(frozen=True)
class WeekdayEffect:
    """Likelihood-ratio test of seven weekday means against one common mean.

    family: the family chosen on the pooled data and used by both models. statistic: the
    likelihood-ratio statistic (scaled as in CountEstimate); df: its degrees of freedom (6);
    p_value: P(chi2_df > statistic); significant: p_value < alpha. pooled: the estimate from all
    days; weekdays: seven estimates, Monday first, each fitted to its own days with `family`
    (a weekday whose negative binomial fit has no overdispersion is reported as Poisson).
    summary: one sentence stating the test and its result.
    """

    family: Family
    statistic: float
    df: int
    p_value: float
    significant: bool
    alpha: float
    pooled: CountEstimate
    weekdays: tuple[CountEstimate, ...]
    summary: str


# -- input validation -----------------------------------------------------------------------


def _as_vector(values: ArrayLike, field: str) -> NDArray[np.float64]:
    try:
        array = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{field}: expected numbers ({exc})") from exc
    if array.ndim != 1:
        raise ValueError(f"{field}: expected one value per day, got shape {array.shape}")
    return array


def _first_bad_count(array: NDArray[np.float64], field: str) -> tuple[int, str] | None:
    """The first row that is not a whole number in 0..MAX_DAILY_UNITS, and what is wrong."""
    bad = ~np.isfinite(array) | (array < 0) | (array != np.floor(array)) | (array > MAX_DAILY_UNITS)
    if not bad.any():
        return None
    i = int(np.argmax(bad))
    value = array[i]
    if np.isnan(value):
        problem = "is NaN"
    elif not np.isfinite(value):
        problem = f"is {value}"
    elif value < 0:
        problem = f"= {value:g} is negative"
    elif value != math.floor(value):
        problem = f"= {value:g} is not a whole number"
    else:
        problem = f"= {value:g} exceeds {MAX_DAILY_UNITS:,} units a day"
    return i, f"row {i}: {field} {problem}"


def _first_bad_weight(array: NDArray[np.float64], field: str) -> tuple[int, str] | None:
    bad = ~np.isfinite(array) | (array < 0)
    if not bad.any():
        return None
    i = int(np.argmax(bad))
    value = array[i]
    problem = "is NaN" if np.isnan(value) else f"= {value:g} is not a finite non-negative number"
    return i, f"row {i}: {field} {problem}"


def _validate(
    counts: dict[str, ArrayLike],
    reals: dict[str, ArrayLike | None],
    *,
    weekday: ArrayLike | None = None,
) -> tuple[dict[str, NDArray[np.float64]], dict[str, NDArray[np.float64] | None]]:
    """Check equal lengths, counts, sold <= stock_at_open and weights; raise on the first row.

    Among all problems the one on the lowest row is reported, naming that row and its field.
    """
    arrays = {field: _as_vector(values, field) for field, values in counts.items()}
    real_arrays = {
        field: None if values is None else _as_vector(values, field)
        for field, values in reals.items()
    }
    days_array = None if weekday is None else _as_vector(weekday, "weekday")
    sized = {**arrays, **{k: v for k, v in real_arrays.items() if v is not None}}
    if days_array is not None:
        sized["weekday"] = days_array
    first_field, first = next(iter(sized.items()))
    for field, array in sized.items():
        if array.size != first.size:
            raise ValueError(
                f"{field} has {array.size} rows but {first_field} has {first.size}; "
                "give one value per day in each"
            )

    problems: list[tuple[int, str]] = []
    for field, array in arrays.items():
        found = _first_bad_count(array, field)
        if found is not None:
            problems.append(found)
    if "sold" in arrays and "stock_at_open" in arrays:
        sold, stock = arrays["sold"], arrays["stock_at_open"]
        with np.errstate(invalid="ignore"):
            over = sold > stock
        if over.any():
            i = int(np.argmax(over))
            problems.append(
                (i, f"row {i}: sold = {sold[i]:g} exceeds stock_at_open = {stock[i]:g}")
            )
    for field, maybe in real_arrays.items():
        if maybe is not None:
            found = _first_bad_weight(maybe, field)
            if found is not None:
                problems.append(found)
    if days_array is not None:
        bad = ~np.isin(days_array, np.arange(7))
        if bad.any():
            i = int(np.argmax(bad))
            problems.append((i, f"row {i}: weekday = {days_array[i]} is not 0 (Monday) .. 6"))
    if problems:
        # min() keeps the first problem found among those on the lowest row.
        raise ValueError(min(problems, key=lambda found: found[0])[1])
    return arrays, real_arrays


# -- aggregated data and the log-likelihood -------------------------------------------------


@dataclass(frozen=True)
class _Counts:
    """Counts merged into distinct (value, sold out) pairs with summed weights.

    Uncensored pairs enter only through tail weights tail[j] = sum of w over values > j,
    j = 0..K-1 (K the largest value), and three sums; censored pairs (value >= 1) are kept as
    arrays, with the constants their terms need for k = 0..top, the largest censored value.
    """

    steps: NDArray[np.float64]
    tail: NDArray[np.float64]
    weight_uncensored: float
    units_uncensored: float
    log_factorials: float
    censored_values: NDArray[np.float64]
    censored_index: NDArray[np.int64]
    censored_weights: NDArray[np.float64]
    shifted_steps: NDArray[np.float64]
    censored_range: NDArray[np.float64]
    log_factorial_k: NDArray[np.float64]
    scale: float
    effective_days: float
    naive_mean: float

    @property
    def has_censored(self) -> bool:
        return self.censored_values.size > 0

    @property
    def all_zero(self) -> bool:
        return not self.has_censored and self.units_uncensored == 0.0


def _aggregate(
    values: NDArray[np.float64], censored: NDArray[np.bool_], weights: NDArray[np.float64]
) -> _Counts:
    """Merge days into distinct pairs; `weights` > 0 only (days of weight 0 are dropped first)."""
    total = float(weights.sum())
    effective = total * total / float(np.dot(weights, weights))
    keys = values.astype(np.int64) * 2 + censored.astype(np.int64)
    unique, inverse = np.unique(keys, return_inverse=True)
    summed = np.bincount(inverse, weights=weights)
    unique_values = (unique // 2).astype(np.float64)
    sold_out = (unique % 2).astype(bool)
    k = int(unique_values.max())
    u_values, u_weights = unique_values[~sold_out], summed[~sold_out]
    # tail[j] = sum of w over uncensored values > j, for j = 0..k-1.
    at_value = np.bincount(u_values.astype(np.int64), weights=u_weights, minlength=k + 1)
    tail = (u_weights.sum() - np.cumsum(at_value))[:k]
    c_values, c_weights = unique_values[sold_out], summed[sold_out]
    top = int(c_values.max()) if c_values.size else 0
    # [0, 0, 1, .., top-1]: cumulative sums over it give sum_{j<k} for k = 0..top.
    shifted = np.concatenate(([0.0], np.arange(top, dtype=np.float64)))
    return _Counts(
        steps=np.arange(k, dtype=np.float64),
        tail=tail,
        weight_uncensored=float(u_weights.sum()),
        units_uncensored=float(np.dot(u_weights, u_values)),
        log_factorials=float(np.dot(u_weights, special.gammaln(u_values + 1.0))),
        censored_values=c_values,
        censored_index=c_values.astype(np.int64),
        censored_weights=c_weights,
        shifted_steps=shifted,
        censored_range=np.arange(top + 1, dtype=np.float64),
        log_factorial_k=special.gammaln(np.arange(top + 1, dtype=np.float64) + 1.0),
        scale=effective / total,
        effective_days=effective,
        naive_mean=float(np.dot(weights, values)) / total,
    )


def _excess_term(mu: float, phi: float) -> float:
    """(log(1 + x) - x/(1 + x)) / phi^2 with x = phi mu; mu^2 / 2 at phi = 0."""
    x = phi * mu
    if x < _SERIES_X:
        # sum_{k>=2} (-1)^k (k-1)/k x^(k-2) by Horner's rule: nine terms leave an error
        # below x^9 < 1e-18.
        series = 0.0
        for k in range(10, 1, -1):
            series = series * x + (-1.0 if k % 2 else 1.0) * (k - 1) / k
        return mu * mu * series
    return (math.log1p(x) - x / (1.0 + x)) / (phi * phi)


def _loglik(d: _Counts, mu: float, phi: float) -> tuple[float, float, float]:
    """Weighted log-likelihood l(mu, phi) (unscaled) and its derivatives (dl/dmu, dl/dphi).

    mu > 0 units per day; phi >= 0, 0 being the Poisson.
    """
    x = phi * mu
    log1p_x = math.log1p(x)
    # log(1 + x)/phi, the log of 1/P(D = 0); mu for the Poisson.
    zero_term = log1p_x / phi if phi > 0.0 else mu
    excess = _excess_term(mu, phi)
    log_ratio = math.log(mu) - log1p_x

    # Uncensored days: sum over values of log P(D = s) and its derivatives.
    wu, su = d.weight_uncensored, d.units_uncensored
    j = d.steps
    value = su * log_ratio - d.log_factorials - wu * zero_term
    d_mu = (su - wu * mu) / (mu * (1.0 + x))
    d_phi = wu * excess - su * mu / (1.0 + x)
    if phi > 0.0:
        value += float(np.dot(np.log1p(phi * j), d.tail))
        d_phi += float(np.dot(j / (1.0 + phi * j), d.tail))
    else:
        d_phi += float(np.dot(j, d.tail))
    if not d.has_censored:
        return value, d_mu, d_phi

    s, index, w = d.censored_values, d.censored_index, d.censored_weights
    shifted, k = d.shifted_steps, d.censored_range
    # log P(D = k) and d/dphi log P(D = k) for k = 0..top.
    log_pmf = k * log_ratio - d.log_factorial_k - zero_term
    pmf_score_phi = excess - k * (mu / (1.0 + x))
    if phi > 0.0:
        log_pmf += np.cumsum(np.log1p(phi * shifted))
        pmf_score_phi += np.cumsum(shifted / (1.0 + phi * shifted))
        # P(D >= s) = I_p(s, 1/phi), the regularised incomplete beta function.
        tail = special.betainc(s, 1.0 / phi, x / (1.0 + x))
    else:
        pmf_score_phi += np.cumsum(shifted)
        # P(D >= s) = P(s, mu), the regularised lower incomplete gamma function.
        tail = special.gammainc(s, mu)
    # Guard for tails below the smallest double: P(D >= s) >= P(D = s).
    positive = tail > 0.0
    log_tail = np.log(tail, where=positive, out=log_pmf[index].copy())
    value += float(np.dot(w, log_tail))
    # P(D = s-1) / P(D >= s), formed in logs so that far tails neither underflow nor overflow.
    ratio = np.exp(log_pmf[index - 1] - log_tail)
    d_mu += float(np.dot(w, ratio * (1.0 + phi * (s - 1.0)))) / (1.0 + x)
    # sum_{k<s} P(D = k) d/dphi log P(D = k), for s = 0..top; 1/P(D >= s) is capped at e^700
    # (reached only at trial points far in a tail, where only the sign of the score matters).
    pmf = np.exp(log_pmf)
    lower = np.cumsum(pmf * pmf_score_phi) - pmf * pmf_score_phi
    d_phi -= float(np.dot(w * np.exp(np.minimum(-log_tail, 700.0)), lower[index]))
    return value, d_mu, d_phi


# -- one-dimensional searches ---------------------------------------------------------------


def _decreasing_root(
    f: Callable[[float], float],
    start: float,
    what: str,
    *,
    positive_at_zero: bool = False,
    upper: float = math.inf,
) -> float:
    """The root x > 0 of f, which is positive below it and negative above it.

    Steps away from `start` by growing ratios (1.1, 1.21, 1.46, ... at most 1e4 a step) until f
    changes sign, then refines by Brent's method. With positive_at_zero (f(0) > 0 is known) a
    downward search that falls below 1e-12 of `start` brackets the root by [0, x] instead. A root
    above `upper` is reported as `upper`. Raises CalibrationError when f keeps its sign over a
    factor of _SEARCH_RANGE either way (the likelihood has no finite maximum).
    """
    # Brent's method is given the values already seen at the bracket's ends: f may carry warm
    # starts, and a second evaluation next to a root could differ in sign by rounding.
    seen: dict[float, float] = {start: f(start)}
    if seen[start] == 0.0:
        return start
    upward = seen[start] > 0.0
    near, ratio = start, 1.1
    while start / _SEARCH_RANGE < near < start * _SEARCH_RANGE:
        far = min(near * ratio, upper) if upward else near / ratio
        if not upward and positive_at_zero and far < 1e-12 * start:
            far = 0.0
        seen[far] = f(far)
        if (seen[far] < 0.0) == upward or far == 0.0:
            lo, hi = min(near, far), max(near, far)
            if seen[lo] <= 0.0:
                # Only rounding can put a non-positive value at the lower end: it is the root.
                return lo
            root = optimize.brentq(
                lambda x: seen[x] if x in seen else f(x), lo, hi, xtol=1e-14 * hi, rtol=1e-13
            )
            return float(root)
        if far == upper:
            return upper
        near, ratio = far, min(ratio * ratio, 1e4)
    raise CalibrationError(f"{what}: the likelihood has no finite maximum")


def _best_mu(d: _Counts, phi: float, start: float) -> float:
    """Maximum-likelihood mean for a fixed dispersion phi (units per day)."""
    if not d.has_censored:
        # For either family the mean's score is zero at the weighted mean (a textbook fact).
        return d.units_uncensored / d.weight_uncensored
    return _decreasing_root(lambda mu: _loglik(d, mu, phi)[1], start, "demand")


def _best_phi(score: Callable[[float], float], start: float) -> float:
    """phi >= 0 maximising a likelihood whose phi-score is `score`: 0 when score(0) <= 0."""
    if score(0.0) <= 0.0:
        return 0.0
    return _decreasing_root(
        score, min(max(start, 1e-6), _MAX_PHI), "dispersion", positive_at_zero=True, upper=_MAX_PHI
    )


@dataclass(frozen=True)
class _NegativeBinomialFit:
    means: tuple[float, ...]
    phi: float
    loglik: float


def _fit_negative_binomial(
    groups: Sequence[_Counts], starts: Sequence[float], phi_start: float
) -> _NegativeBinomialFit:
    """Joint maximum of sum_g l_g(mu_g, phi): one mean per group, one shared dispersion.

    A group whose every observation is 0 has its maximum at mu = 0 with l = 0 for every phi.
    """
    means = [
        0.0 if d.all_zero else max(start, 1e-3) for d, start in zip(groups, starts, strict=True)
    ]
    active = [g for g, d in enumerate(groups) if not d.all_zero]

    def profile_score(phi: float) -> float:
        total = 0.0
        for g in active:
            means[g] = _best_mu(groups[g], phi, means[g])
            total += _loglik(groups[g], means[g], phi)[2]
        return total

    phi = _best_phi(profile_score, phi_start)
    loglik = 0.0
    for g in active:
        means[g] = _best_mu(groups[g], phi, means[g])
        loglik += _loglik(groups[g], means[g], phi)[0]
    return _NegativeBinomialFit(tuple(means), phi, loglik)


def _moment_phi(d: _Counts, mu: float) -> float:
    """A starting dispersion: phi with variance mu + phi mu^2 matching the plain moments."""
    # The uncensored second moment from the tail weights: sum w s^2 = sum_j (2j + 1) tail[j].
    j = d.steps
    if d.weight_uncensored == 0.0:
        return 0.1
    second = float(np.dot(2.0 * j + 1.0, d.tail)) / d.weight_uncensored
    first = d.units_uncensored / d.weight_uncensored
    excess = second - first * first - first
    return excess / (mu * mu) if excess > 0.0 else 0.1


def _profile_interval(
    profile: Callable[[float], float], estimate: float, peak: float, d: _Counts, drop: float
) -> tuple[float, float]:
    """Where the scaled profile log-likelihood falls `drop` below its peak, either side.

    `profile(x)` is the unscaled maximised log-likelihood at parameter x > 0. The search runs on
    the signed root r = sqrt(2 scale (peak - profile)) against log x, which is nearly linear, so
    a few steps bracket each end and Brent's method finishes it. The lower end is 0 and the upper
    inf when no such point exists within a factor of e^_MAX_LOG_RANGE of the estimate.
    """
    target = math.sqrt(2.0 * drop)
    centre = math.log(estimate)

    def distance(offset: float, direction: float) -> float:
        fall = d.scale * (peak - profile(math.exp(centre + direction * offset)))
        return math.sqrt(max(2.0 * fall, 0.0)) - target

    # A first step of about two Poisson standard errors of the log mean.
    first = min(1.0, 2.0 / math.sqrt(max(d.effective_days * estimate, 1e-12)))
    ends: list[float] = []
    for direction, unbounded in ((-1.0, 0.0), (1.0, math.inf)):
        # Values seen, handed back to Brent's method (the profile carries warm starts).
        seen = {0.0: -target}
        inner, offset = 0.0, first
        while offset <= _MAX_LOG_RANGE:
            seen[offset] = distance(offset, direction)
            if seen[offset] > 0.0:
                break
            inner = offset
            # Extrapolate r linearly in the offset (r = 0 at offset 0), slightly beyond.
            reached = seen[offset] + target
            growth = 4.0 if reached <= 0.0 else min(4.0, max(1.1, 1.1 * target / reached))
            offset *= growth
        else:
            ends.append(unbounded)
            continue
        root = optimize.brentq(
            lambda o, sign=direction, known=seen: known[o] if o in known else distance(o, sign),
            inner,
            offset,
            xtol=1e-10,
        )
        ends.append(math.exp(centre + direction * float(root)))
    return ends[0], ends[1]


# -- estimation -----------------------------------------------------------------------------


def _format_p(p: float) -> str:
    return f"{p:.2g}"


def _estimate(
    d: _Counts, *, confidence: float, alpha: float, forced: Family | None = None
) -> tuple[CountEstimate, float]:
    """The estimate of one data set, and its Poisson mean (for the weekday test).

    `forced` imposes a family (the weekday comparison); the test is still run and reported.
    """
    drop = float(stats.chi2.ppf(confidence, 1)) / 2.0
    if d.all_zero:
        # Every observation is 0: the Poisson maximum is at mu = 0 with l = 0, and l(mu) = -W mu,
        # so the profile interval ends where scale * W * mu = drop.
        upper = drop / (d.scale * d.weight_uncensored)
        return (
            CountEstimate(
                family="poisson",
                mean=0.0,
                mean_interval=(0.0, upper),
                variance=0.0,
                variance_interval=None,
                naive_mean=d.naive_mean,
                log_likelihood_poisson=0.0,
                log_likelihood_negative_binomial=None,
                p_value=1.0,
                selection="poisson: every observation is 0, so no dispersion can be estimated",
                confidence=confidence,
                effective_days=d.effective_days,
            ),
            0.0,
        )

    mu_p = _best_mu(d, 0.0, max(d.naive_mean, 1e-3))
    ll_p = _loglik(d, mu_p, 0.0)[0]
    nb: _NegativeBinomialFit | None
    try:
        nb = _fit_negative_binomial([d], [mu_p], _moment_phi(d, mu_p))
    except CalibrationError:
        nb = None
    if nb is not None and nb.phi >= _MAX_PHI:
        # The likelihood keeps rising towards a degenerate law (almost all days 0, a few
        # enormous): no finite negative binomial maximum, so no test.
        nb = None
    if nb is None:
        ll_nb, p_value = None, 1.0
    else:
        ll_nb = max(nb.loglik, ll_p) if nb.phi > 0.0 else ll_p
        statistic = 2.0 * d.scale * (ll_nb - ll_p)
        p_value = 0.5 * float(stats.chi2.sf(statistic, 1)) if statistic > 0.0 else 1.0

    test = f"likelihood-ratio test against Poisson, p = {_format_p(p_value)}"
    family: Family = "poisson"
    if nb is None:
        selection = (
            "poisson: the negative binomial likelihood has no finite maximum on these days "
            "(too few days with sales below stock), so no test is possible"
        )
    elif forced is None:
        if p_value < alpha:
            family = "negative_binomial"
            selection = f"negative binomial: {test}"
        elif nb.phi == 0.0:
            selection = (
                "poisson: the data show no overdispersion (negative binomial fit is Poisson)"
            )
        else:
            selection = f"poisson: no evidence of overdispersion ({test})"
    elif forced == "negative_binomial" and nb.phi == 0.0:
        selection = "poisson: the negative binomial fit of these days has no overdispersion"
    else:
        family = forced
        name = "negative binomial" if forced == "negative_binomial" else "poisson"
        selection = f"{name}: the family chosen for the pooled data ({test} on these days)"

    if family == "poisson":

        def poisson_profile(mu: float) -> float:
            return _loglik(d, mu, 0.0)[0]

        mean, variance = mu_p, mu_p
        mean_interval = _profile_interval(poisson_profile, mu_p, ll_p, d, drop)
        variance_interval = None
    else:
        assert nb is not None
        mean = nb.means[0]
        variance = mean + nb.phi * mean * mean
        mean_interval = _profile_interval(_mean_profile(d, nb.phi), mean, nb.loglik, d, drop)
        variance_interval = _profile_interval(
            _variance_profile(d, mean), variance, nb.loglik, d, drop
        )
    estimate = CountEstimate(
        family=family,
        mean=mean,
        mean_interval=mean_interval,
        variance=variance,
        variance_interval=variance_interval,
        naive_mean=d.naive_mean,
        log_likelihood_poisson=d.scale * ll_p,
        log_likelihood_negative_binomial=None if ll_nb is None else d.scale * ll_nb,
        p_value=p_value,
        selection=selection,
        confidence=confidence,
        effective_days=d.effective_days,
    )
    return estimate, mu_p


def _mean_profile(d: _Counts, phi_start: float) -> Callable[[float], float]:
    """mu -> max over phi >= 0 of l(mu, phi), warm-started from the previous phi."""
    last = [phi_start]

    def profile(mu: float) -> float:
        last[0] = _best_phi(lambda phi: _loglik(d, mu, phi)[2], last[0])
        return _loglik(d, mu, last[0])[0]

    return profile


def _variance_profile(d: _Counts, mu_start: float) -> Callable[[float], float]:
    """v -> max over 0 < mu <= v of l(mu, phi) with phi = (v - mu) / mu^2, warm-started."""
    last = [mu_start]

    def along(v: float, mu: float) -> tuple[float, float]:
        """l and its total derivative in mu at fixed variance v (mu <= v)."""
        phi = max((v - mu) / (mu * mu), 0.0)
        value, d_mu, d_phi = _loglik(d, mu, phi)
        # dphi/dmu = -(2v - mu) / mu^3 along fixed v.
        return value, d_mu - d_phi * (2.0 * v - mu) / mu**3

    def profile(v: float) -> float:
        at_poisson = along(v, v)
        if at_poisson[1] >= 0.0:
            # The best mean is v itself: no overdispersion left at this variance.
            last[0] = v
            return at_poisson[0]
        # Past v the slope is that of the boundary (negative), so the root lies below v.
        mu = _decreasing_root(lambda m: along(v, min(m, v))[1], min(last[0], v), "variance")
        last[0] = min(mu, v)
        return along(v, last[0])[0]

    return profile


def _check_levels(confidence: float, alpha: float) -> None:
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence = {confidence:g} must lie strictly between 0 and 1")
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha = {alpha:g} must lie strictly between 0 and 1")


def _weights_or_ones(weights: NDArray[np.float64] | None, n: int) -> NDArray[np.float64]:
    return np.ones(n) if weights is None else weights


def _demand_counts(
    sold: NDArray[np.float64],
    stock: NDArray[np.float64],
    weights: NDArray[np.float64],
    where: str = "",
) -> _Counts:
    """Aggregate the days with stock; raise CalibrationError when demand is not identified."""
    informative = (stock > 0) & (weights > 0)
    prefix = f"{where}: " if where else ""
    if not informative.any():
        raise CalibrationError(
            f"{prefix}no day with stock on hand (and a positive weight) among {sold.size} days; "
            "demand cannot be estimated"
        )
    censored = sold == stock
    if censored[informative].all():
        s, w = sold[informative], weights[informative]
        at_least = float(np.dot(s, w) / w.sum())
        raise CalibrationError(
            f"{prefix}every day with stock sold out ({int(informative.sum())} days); demand is "
            f"at least {at_least:.3g} per day but cannot be estimated"
        )
    return _aggregate(sold[informative], censored[informative], weights[informative])


def estimate_demand(
    sold: ArrayLike,
    stock_at_open: ArrayLike,
    *,
    weights: ArrayLike | None = None,
    confidence: float = 0.95,
    alpha: float = 0.05,
) -> CountEstimate:
    """Daily demand by censored maximum likelihood (see the module docstring).

    sold, stock_at_open: shape (n_days,), whole units; a day with sold == stock_at_open > 0 sold
    out and says only that demand was at least `sold`; days with stock_at_open == 0 are ignored.
    weights: shape (n_days,), non-negative, relative (see recency_weights); None means all 1.
    The mean's interval is a profile-likelihood interval at `confidence`; the negative binomial
    is chosen over the Poisson when the likelihood-ratio test rejects the Poisson at `alpha`.
    Raises ValueError on malformed input and CalibrationError when no day with stock exists or
    every such day sold out.
    """
    arrays, reals = _validate({"sold": sold, "stock_at_open": stock_at_open}, {"weights": weights})
    _check_levels(confidence, alpha)
    n = arrays["sold"].size
    d = _demand_counts(
        arrays["sold"], arrays["stock_at_open"], _weights_or_ones(reals["weights"], n)
    )
    return _estimate(d, confidence=confidence, alpha=alpha)[0]


def estimate_replenishment(
    received: ArrayLike,
    *,
    weights: ArrayLike | None = None,
    confidence: float = 0.95,
    alpha: float = 0.05,
) -> CountEstimate:
    """Daily replenishment by maximum likelihood; receipts are fully observed (no censoring).

    received: shape (n_days,), whole units received per day. weights, confidence and alpha as in
    estimate_demand. Raises CalibrationError when no day (of positive weight) is given.
    """
    arrays, reals = _validate({"received": received}, {"weights": weights})
    _check_levels(confidence, alpha)
    values = arrays["received"]
    w = _weights_or_ones(reals["weights"], values.size)
    keep = w > 0
    if not keep.any():
        raise CalibrationError(
            f"no day of receipts with a positive weight among {values.size} days; "
            "replenishment cannot be estimated"
        )
    d = _aggregate(values[keep], np.zeros(int(keep.sum()), dtype=bool), w[keep])
    return _estimate(d, confidence=confidence, alpha=alpha)[0]


def recency_weights(age_days: ArrayLike, half_life_days: float) -> NDArray[np.float64]:
    """Exponential recency weights 0.5 ** (age_days / half_life_days).

    age_days: shape (n_days,), days before the most recent day (>= 0, not necessarily whole).
    half_life_days: > 0. Returns shape (n_days,), in (0, 1].
    """
    if not (math.isfinite(half_life_days) and half_life_days > 0.0):
        raise ValueError(f"half_life_days = {half_life_days:g} must be a positive number of days")
    ages = _validate({}, {"age_days": age_days})[1]["age_days"]
    assert ages is not None
    return np.power(0.5, ages / half_life_days)


def _wide(estimate: CountEstimate, what: str) -> str | None:
    lo, hi = estimate.mean_interval
    if (hi - lo) / 2.0 <= WIDE_INTERVAL_RATIO * estimate.mean:
        return None
    level = f"{estimate.confidence:.0%}"
    return (
        f"The {what} interval ({lo:.3g} to {hi:.3g} per day, {level}) is wide relative to its "
        f"mean of {estimate.mean:.3g}; more history would narrow it."
    )


def calibrate_location(
    sold: ArrayLike,
    stock_at_open: ArrayLike,
    received: ArrayLike,
    *,
    age_days: ArrayLike | None = None,
    half_life_days: float | None = None,
    confidence: float = 0.95,
    alpha: float = 0.05,
) -> LocationCalibration:
    """Demand and replenishment laws of one location from its daily history.

    sold, stock_at_open, received: shape (n_days,), whole units per day. age_days: shape
    (n_days,), days before the most recent day; it is checked but used only with
    `half_life_days`, which weights the days by recency_weights(age_days, half_life_days); without
    age_days the rows are taken in date order, the last being the most recent (age 0). Warnings
    flag a short history (fewer than SHORT_HISTORY_DAYS days), more than half of the days with
    stock sold out, and wide intervals (half-width above half the mean).
    """
    arrays, reals = _validate(
        {"sold": sold, "stock_at_open": stock_at_open, "received": received},
        {"age_days": age_days},
    )
    n = arrays["sold"].size
    weights = None
    if half_life_days is not None:
        ages = reals["age_days"]
        weights = recency_weights(
            np.arange(n - 1, -1, -1, dtype=np.float64) if ages is None else ages, half_life_days
        )

    demand = estimate_demand(
        arrays["sold"], arrays["stock_at_open"], weights=weights, confidence=confidence, alpha=alpha
    )
    replenishment = estimate_replenishment(
        arrays["received"], weights=weights, confidence=confidence, alpha=alpha
    )
    stock = arrays["stock_at_open"]
    with_stock = int(np.count_nonzero(stock > 0))
    censored = int(np.count_nonzero((arrays["sold"] == stock) & (stock > 0)))
    warnings: list[str] = []
    if n < SHORT_HISTORY_DAYS:
        warnings.append(
            f"Only {n} days of history (fewer than {SHORT_HISTORY_DAYS}); the estimates are "
            "uncertain."
        )
    if 2 * censored > with_stock:
        warnings.append(
            f"{censored} of {with_stock} days with stock sold out; the estimates rely heavily on "
            "the censoring model."
        )
    for estimate, what in ((demand, "demand"), (replenishment, "replenishment")):
        message = _wide(estimate, what)
        if message is not None:
            warnings.append(message)
    return LocationCalibration(
        days=n,
        censored_days=censored,
        days_without_stock=n - with_stock,
        demand=demand,
        replenishment=replenishment,
        warnings=tuple(warnings),
    )


def weekday_effect(
    sold: ArrayLike,
    stock_at_open: ArrayLike,
    weekday: ArrayLike,
    *,
    weights: ArrayLike | None = None,
    confidence: float = 0.95,
    alpha: float = 0.05,
) -> WeekdayEffect:
    """Test whether mean demand differs between weekdays (censored likelihood-ratio test).

    sold, stock_at_open: as in estimate_demand; weekday: shape (n_days,), 0 = Monday .. 6 =
    Sunday. The family is chosen on the pooled days as in estimate_demand and used by both
    models: one common mean against seven weekday means (for the negative binomial, with one
    dispersion shared by all weekdays), so the statistic has 6 df. weights as in
    estimate_demand; both models' log-likelihoods are scaled by the pooled n_eff / sum w. Raises
    CalibrationError naming a weekday whose demand cannot be estimated.
    """
    arrays, reals = _validate(
        {"sold": sold, "stock_at_open": stock_at_open}, {"weights": weights}, weekday=weekday
    )
    _check_levels(confidence, alpha)
    s, stock = arrays["sold"], arrays["stock_at_open"]
    w = _weights_or_ones(reals["weights"], s.size)
    days = np.asarray(weekday, dtype=np.float64)
    pooled_counts = _demand_counts(s, stock, w)
    pooled, pooled_mu = _estimate(pooled_counts, confidence=confidence, alpha=alpha)
    groups = [
        _demand_counts(s[days == day], stock[days == day], w[days == day], WEEKDAY_NAMES[day])
        for day in range(7)
    ]
    fitted = [
        _estimate(g, confidence=confidence, alpha=alpha, forced=pooled.family) for g in groups
    ]

    if pooled.family == "poisson":
        null = _loglik(pooled_counts, pooled_mu, 0.0)[0] if pooled_mu > 0.0 else 0.0
        alternative = sum(
            _loglik(g, mu, 0.0)[0] if mu > 0.0 else 0.0
            for g, (_, mu) in zip(groups, fitted, strict=True)
        )
        models = "seven Poisson means against one"
    else:
        null_fit = _fit_negative_binomial([pooled_counts], [pooled.mean], _phi_of(pooled))
        try:
            joint = _fit_negative_binomial(groups, [mu for _, mu in fitted], _phi_of(pooled))
        except CalibrationError as exc:
            raise CalibrationError(
                "weekday comparison: the negative binomial with one shared dispersion has no "
                "finite maximum on these days"
            ) from exc
        null, alternative = null_fit.loglik, max(joint.loglik, null_fit.loglik)
        models = "seven negative binomial means with one shared dispersion against one mean"
    df = 6
    statistic = 2.0 * pooled_counts.scale * (alternative - null)
    statistic = max(statistic, 0.0)
    p_value = float(stats.chi2.sf(statistic, df))
    significant = p_value < alpha
    verdict = "weekday means differ" if significant else "no evidence that weekday means differ"
    summary = (
        f"{verdict}: likelihood-ratio test of {models}, statistic {statistic:.3g} on {df} df, "
        f"p = {_format_p(p_value)}"
    )
    return WeekdayEffect(
        family=pooled.family,
        statistic=statistic,
        df=df,
        p_value=p_value,
        significant=significant,
        alpha=alpha,
        pooled=pooled,
        weekdays=tuple(estimate for estimate, _ in fitted),
        summary=summary,
    )


def _phi_of(estimate: CountEstimate) -> float:
    return (estimate.variance - estimate.mean) / (estimate.mean * estimate.mean)
