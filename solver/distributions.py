"""Daily count distributions: probabilities, tails and partial expectations, exact over the full
support.

For a nonnegative integer random variable D with pmf p and survival function S(k) = P(D > k):

    E min(D, y)  = sum_{k=0}^{y-1} S(k)          (tail-sum formula, no truncation)
    E (D - y)^+  = E D - E min(D, y)

The negative binomial with mean mu and variance v > mu is scipy's ``nbinom(n, q)`` with
q = mu / v and n = mu^2 / (v - mu), i.e. a Poisson whose mean is gamma distributed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy import stats

from solver.spec import Distribution, NegativeBinomialDemand, PmfDemand, PoissonDemand

__all__ = ["CountLaw", "count_law"]


@dataclass(frozen=True)
class CountLaw:
    """A count distribution evaluated on 0..n_points-1.

    pmf[k] = P(X = k), sf[k] = P(X > k); both shape (n_points,). `mean` is E X.
    """

    pmf: NDArray[np.float64]
    sf: NDArray[np.float64]
    mean: float

    def expected_min(self) -> NDArray[np.float64]:
        """E min(X, y) for y = 0..n_points-1, shape (n_points,)."""
        out = np.zeros_like(self.sf)
        np.cumsum(self.sf[:-1], out=out[1:])
        return out

    def expected_excess(self) -> NDArray[np.float64]:
        """E (X - y)^+ for y = 0..n_points-1, shape (n_points,)."""
        return np.maximum(self.mean - self.expected_min(), 0.0)


def count_law(dist: Distribution, n_points: int) -> CountLaw:
    """Evaluate `dist` at 0..n_points-1 (exactly; tails are kept in `sf`)."""
    k = np.arange(n_points)
    if isinstance(dist, PoissonDemand):
        law = stats.poisson(dist.mean)
        return CountLaw(law.pmf(k), law.sf(k), float(dist.mean))
    if isinstance(dist, NegativeBinomialDemand):
        q = dist.mean / dist.variance
        n = dist.mean * q / (1.0 - q)
        law = stats.nbinom(n, q)
        return CountLaw(law.pmf(k), law.sf(k), float(dist.mean))
    if isinstance(dist, PmfDemand):
        return _explicit_law(np.asarray(dist.p, dtype=np.float64), n_points)
    raise TypeError(f"unsupported distribution {dist!r}")


def _explicit_law(p: NDArray[np.float64], n_points: int) -> CountLaw:
    # Normalise away the (at most 1e-9) rounding the specification allows, so kernels sum to 1.
    p = p / p.sum()
    # Tails summed from the far end keep small probabilities accurate.
    tail = np.cumsum(p[::-1])[::-1]
    sf_all = np.append(tail[1:], 0.0)
    pmf = np.zeros(n_points)
    sf = np.zeros(n_points)
    m = min(n_points, p.size)
    pmf[:m] = p[:m]
    sf[:m] = sf_all[:m]
    mean = float(np.dot(np.arange(p.size), p))
    return CountLaw(pmf, sf, mean)
