"""Simulation of transfer policies: the solver's values and gains checked by Monte Carlo, baselines
against the optimum, common random numbers, and input checks.

Independent references used here:
  * tests/solver/reference.py: each network's MDP rebuilt by brute force from its specification
    with scipy.stats (every flow, transition and one-day reward), independent of solver/;
  * policy evaluation by dense linear algebra, (I - beta P_sigma) v = r_sigma solved with
    numpy.linalg.solve (Puterman 1994, Markov Decision Processes, section 6.1; from memory);
  * stationary distributions as the eigenvector of P^T for eigenvalue 1 (numpy.linalg.eig) and
    quantecon.MarkovChain (QuantEcon, PyPI);
  * inverse transform sampling against scipy.stats ppf.

Every Monte Carlo check asks for a 99.9% interval: with about forty such intervals in this file
the chance that any misses by bad luck is at most about 4% (Bonferroni), and every seed is fixed.
"""

from __future__ import annotations

import dataclasses
import re
from typing import Any

import numpy as np
import pytest
from numpy.testing import assert_array_equal
from numpy.typing import NDArray
from scipy import stats

from solver import NetworkSpec, PolicyResult, TransferModel, build_transfer_model, solve_network
from solver.simulation import (
    TAIL_PROBABILITY,
    Interval,
    balance_cover_policy,
    count_table,
    daily_laws,
    do_nothing_policy,
    draw_counts,
    mean_demands,
    simulate_discounted_return,
    simulate_policies,
)
from solver.spec import Distribution, LocationSpec, WeeklyDistribution
from tests.solver.networks import location as location_json
from tests.solver.networks import negative_binomial, pmf, poisson
from tests.solver.reference import (
    ReferenceMDP,
    build_reference,
    count_atoms,
    location_transition_by_enumeration,
    make_network,
    scipy_law,
    stationary_gain,
)

LEVEL = 0.999


def battery_kiosks() -> NetworkSpec:
    """Two scooter-hire kiosks sharing spare batteries: the pier is busy and under-supplied,
    the station quiet and restocked in small batches."""
    return make_network(
        "spare batteries",
        [
            location_json(
                "pier",
                6,
                negative_binomial(2.4, 4.0),
                poisson(1.5),
                margin=9.0,
                holding=0.3,
                penalty=1.5,
            ),
            location_json(
                "station",
                5,
                poisson(1.2),
                pmf(0.2, 0.3, 0.3, 0.2),
                margin=11.0,
                holding=0.2,
                penalty=2.0,
            ),
        ],
        [(0, 1, 0.8, 3), (1, 0, 1.1, 2)],
        discount=0.9,
    )


def three_bike_shops() -> NetworkSpec:
    """Three bike shops passing child seats along a ring, with one return lane."""
    return make_network(
        "child seats",
        [
            location_json(
                "harbour", 5, poisson(1.9), poisson(1.2), margin=14.0, holding=0.4, penalty=2.5
            ),
            location_json(
                "uptown",
                4,
                pmf(0.3, 0.4, 0.2, 0.1),
                poisson(1.4),
                margin=12.5,
                holding=0.25,
                penalty=1.0,
            ),
            location_json(
                "mills",
                4,
                negative_binomial(1.3, 2.4),
                poisson(1.0),
                margin=13.0,
                holding=0.3,
                penalty=0.0,
            ),
        ],
        [(0, 1, 0.9, 2), (1, 2, 0.7, 2), (2, 0, 1.2, 1), (1, 0, 0.5, 1)],
        discount=0.95,
        max_units_per_night=2,
    )


def free_lane_pair() -> NetworkSpec:
    """Two garden centres of one owner, whose own van moves mowers at no cost per unit."""
    return make_network(
        "mowers, own van",
        [
            location_json(
                "east", 7, poisson(2.6), poisson(1.6), margin=16.0, holding=0.5, penalty=3.0
            ),
            location_json(
                "west", 6, poisson(1.1), poisson(1.9), margin=15.0, holding=0.4, penalty=3.0
            ),
        ],
        [(0, 1, 0.0, 2), (1, 0, 0.0, 2)],
        discount=0.95,
    )


def one_unit_lane_pair() -> NetworkSpec:
    """Two tool-hire depots joined by a courier that takes one unit a night."""
    return make_network(
        "tile cutters, courier",
        [
            location_json(
                "docks",
                6,
                negative_binomial(2.0, 3.6),
                poisson(1.2),
                margin=20.0,
                holding=0.6,
                penalty=4.0,
            ),
            location_json(
                "ridge",
                6,
                poisson(1.0),
                pmf(0.25, 0.25, 0.3, 0.2),
                margin=18.0,
                holding=0.5,
                penalty=4.0,
            ),
        ],
        [(0, 1, 2.5, 1), (1, 0, 2.5, 1)],
        discount=0.95,
        max_units_per_night=1,
    )


def far_apart_pair() -> NetworkSpec:
    """Two paint shops in different towns: moving a unit costs far more than it could earn."""
    return make_network(
        "paint sprayers, far apart",
        [
            location_json(
                "northfield", 5, poisson(1.8), poisson(1.3), margin=10.0, holding=0.3, penalty=1.0
            ),
            location_json(
                "southbay",
                4,
                negative_binomial(1.1, 2.0),
                poisson(1.4),
                margin=12.0,
                holding=0.2,
                penalty=0.5,
            ),
        ],
        [(0, 1, 250.0, 2), (1, 0, 250.0, 2)],
        discount=0.95,
    )


def stationary(law: Distribution | WeeklyDistribution) -> Distribution:
    """The one law of a location without weekly fields."""
    assert not isinstance(law, WeeklyDistribution)
    return law


@dataclasses.dataclass(frozen=True)
class Solved:
    spec: NetworkSpec
    model: TransferModel
    result: PolicyResult

    def index(self, stock: tuple[int, ...]) -> int:
        return int(np.ravel_multi_index(stock, self.model.shape))

    def policies(self) -> dict[str, NDArray[np.int64]]:
        return {
            "optimal": self.result.action[0],
            "balance": balance_cover_policy(self.model, mean_demands(self.spec))[0],
            "nothing": do_nothing_policy(self.model),
        }


def solved(spec: NetworkSpec, criterion: str) -> Solved:
    result = solve_network(spec, criterion=criterion)  # type: ignore[arg-type]
    assert result.converged
    return Solved(spec, build_transfer_model(spec), result)


@pytest.fixture(scope="module")
def kiosks() -> Solved:
    return solved(battery_kiosks(), "discounted")


@pytest.fixture(scope="module")
def kiosks_reference(kiosks: Solved) -> ReferenceMDP:
    return build_reference(kiosks.spec)


@pytest.fixture(scope="module")
def heuristic_values(kiosks: Solved, kiosks_reference: ReferenceMDP) -> NDArray[np.float64]:
    """Discounted values of balance_cover_policy on the kiosks, shape (S,)."""
    policy = balance_cover_policy(kiosks.model, mean_demands(kiosks.spec))[0]
    reward, transition = kiosks_reference.policy_chain(kiosks.model.flows[policy])
    # Reference: (I - beta P_sigma) v = r_sigma by numpy.linalg.solve on the brute-force MDP
    # (Puterman 1994, section 6.1; from memory).
    beta = kiosks.spec.discount
    system = np.eye(kiosks_reference.n_states) - beta * transition
    return np.asarray(np.linalg.solve(system, reward), dtype=np.float64)


class TestCountTables:
    @pytest.mark.parametrize(
        "dist",
        [poisson(0.7), poisson(6.5), negative_binomial(2.4, 4.0), negative_binomial(1.3, 9.0)],
        ids=["poisson-small", "poisson", "nbinom", "nbinom-heavy"],
    )
    def test_inverse_transform_matches_scipy_ppf(self, dist: dict[str, Any]) -> None:
        location = LocationSpec.model_validate(
            location_json("x", 5, dist, dist, margin=1.0, holding=0, penalty=0)
        )
        table = count_table(stationary(location.demand))
        law = scipy_law(location.demand)
        u = np.random.default_rng(31).random(20_000)
        # Reference: scipy.stats ppf(q) = min{k : F(k) >= q}; ours is min{k : F(k) > u}, equal
        # except when u hits some F(k) exactly, which has probability 0.
        assert_array_equal(table.quantile(u), law.ppf(u).astype(np.int64))

    def test_explicit_pmf_matches_scipy_rv_discrete(self) -> None:
        p = [0.1, 0.0, 0.25, 0.4, 0.0, 0.25]
        location = LocationSpec.model_validate(
            location_json("x", 3, pmf(*p), pmf(*p), margin=1.0, holding=0, penalty=0)
        )
        table = count_table(stationary(location.demand))
        u = np.random.default_rng(37).random(20_000)
        draws = table.quantile(u)
        # Reference: scipy.stats.rv_discrete(values=(k, p)).ppf.
        law = stats.rv_discrete(values=(np.arange(len(p)), p))
        assert_array_equal(draws, law.ppf(u).astype(np.int64))
        assert not np.isin(draws, [1, 4]).any()  # counts of probability 0 never drawn

    def test_the_smallest_uniform_never_gives_a_count_of_probability_zero(self) -> None:
        # rng.random() can return exactly 0.0; with P(X = 0) = 0 the draw must still be 1.
        spec = pmf(0.0, 0.5, 0.5)
        location = LocationSpec.model_validate(
            location_json("x", 3, spec, spec, margin=1.0, holding=0, penalty=0)
        )
        assert count_table(stationary(location.demand)).quantile(np.array([0.0]))[0] == 1

    def test_table_reaches_the_stated_tail_and_no_further(self) -> None:
        location = LocationSpec.model_validate(
            location_json(
                "x", 5, negative_binomial(3.0, 12.0), poisson(1.0), margin=1.0, holding=0, penalty=0
            )
        )
        table = count_table(stationary(location.demand))
        law = scipy_law(location.demand)
        top = table.cdf.size - 1
        # Reference: scipy.stats sf. The table stops at the first K with P(X > K) <= 1e-15.
        assert law.sf(top) <= TAIL_PROBABILITY < law.sf(top - 1)
        # The largest uniform below 1 gives K or, in the far tail, K + 1: never more.
        assert table.quantile(np.array([np.nextafter(1.0, 0.0)]))[0] in (top, top + 1)

    def test_drawing_in_pieces_gives_the_same_counts(self, kiosks: Solved) -> None:
        laws = daily_laws(kiosks.spec)
        whole = draw_counts(laws, np.random.default_rng(5), 12, 7)
        rng = np.random.default_rng(5)
        first, second = draw_counts(laws, rng, 5, 7), draw_counts(laws, rng, 7, 7)
        for k in range(2):
            assert_array_equal(np.concatenate([first[k], second[k]]), whole[k])


class TestDiscountedValues:
    """Monte Carlo estimates of E sum_t beta^t pi_t against the solver and dense evaluation."""

    STARTS = ((0, 0), (6, 0), (2, 5))
    DAYS = 250
    REPLICATIONS = 20_000

    def truncation(self, kiosks: Solved, reference: ReferenceMDP) -> float:
        """Largest effect of stopping after DAYS days: beta^H max |r(s, f)| / (1 - beta), r the
        expected one-day profit of a state and flow."""
        beta = kiosks.spec.discount
        return float(beta**self.DAYS * np.max(np.abs(reference.rewards)) / (1.0 - beta))

    def estimate(
        self, kiosks: Solved, policy: NDArray[np.int64], start: tuple[int, ...]
    ) -> Interval:
        return simulate_discounted_return(
            kiosks.spec,
            kiosks.model,
            policy,
            start,
            discount=kiosks.spec.discount,
            days=self.DAYS,
            replications=self.REPLICATIONS,
            rng=np.random.default_rng(sum(start) * 1_000 + 17),
            confidence=LEVEL,
        )

    def test_result_flows_are_the_model_flow_table(self, kiosks: Solved) -> None:
        assert_array_equal(kiosks.result.flows, kiosks.model.flows)

    @pytest.mark.parametrize("start", STARTS)
    def test_optimal_values_lie_in_the_monte_carlo_interval(
        self, kiosks: Solved, kiosks_reference: ReferenceMDP, start: tuple[int, int]
    ) -> None:
        interval = self.estimate(kiosks, kiosks.result.action[0], start)
        # 0.9^250 * max|r| / 0.1 is about 1e-9: negligible next to the interval's width.
        assert self.truncation(kiosks, kiosks_reference) < 1e-3 * interval.half_width
        # Checked: the solver's optimal discounted value (Howard's policy iteration).
        assert kiosks.result.values[0][kiosks.index(start)] in interval

    @pytest.mark.parametrize("start", STARTS)
    def test_heuristic_values_match_dense_policy_evaluation(
        self,
        kiosks: Solved,
        kiosks_reference: ReferenceMDP,
        heuristic_values: NDArray[np.float64],
        start: tuple[int, int],
    ) -> None:
        policy = balance_cover_policy(kiosks.model, mean_demands(kiosks.spec))[0]
        interval = self.estimate(kiosks, policy, start)
        assert self.truncation(kiosks, kiosks_reference) < 1e-3 * interval.half_width
        assert heuristic_values[kiosks.index(start)] in interval

    def test_the_heuristic_is_a_different_and_worse_policy(
        self, kiosks: Solved, heuristic_values: NDArray[np.float64]
    ) -> None:
        # So the dense-evaluation check above is not the optimal-value check again. No policy
        # is worth more than the optimum in any state (Puterman 1994, section 6.2; from memory).
        gaps = kiosks.result.values[0] - heuristic_values
        assert gaps.min() > -1e-8
        assert gaps[[kiosks.index(s) for s in self.STARTS]].max() > 0.5

    @pytest.mark.parametrize("start", [(0, 5), (4, 1), (6, 5)])
    def test_one_day_profit_is_the_expected_reward_of_the_move(
        self, kiosks: Solved, kiosks_reference: ReferenceMDP, start: tuple[int, int]
    ) -> None:
        policy = kiosks.result.action[0]
        interval = simulate_discounted_return(
            kiosks.spec,
            kiosks.model,
            policy,
            start,
            discount=kiosks.spec.discount,
            days=1,
            replications=100_000,
            rng=np.random.default_rng(start[0] * 10 + start[1]),
            confidence=LEVEL,
        )
        pair = kiosks_reference.pair_indices(kiosks.model.flows[policy])[kiosks.index(start)]
        # Reference: r(s, f) = sum_i [m E min(D, y) - h y - p E (D - y)^+] - cost(f), summed
        # directly over scipy.stats laws.
        assert kiosks_reference.rewards[pair] in interval


def test_long_run_profit_of_the_average_optimal_policy_matches_its_gain() -> None:
    shops = solved(three_bike_shops(), "average")
    report = simulate_policies(
        shops.spec,
        shops.model,
        {"optimal": shops.result.action[0]},
        days=4_000,
        replications=40,
        rng=np.random.default_rng(2_024),
        warmup_days=200,
        confidence=LEVEL,
    )
    assert shops.result.gain is not None
    # Checked: the solver's gain (Howard's policy iteration, average criterion).
    assert shops.result.gain in report.outcome("optimal").profit_per_day


class TestBaselines:
    @pytest.fixture(scope="class", params=["free-lanes", "one-unit-lane"])
    @classmethod
    def network(cls, request: pytest.FixtureRequest) -> Solved:
        specs = {"free-lanes": free_lane_pair, "one-unit-lane": one_unit_lane_pair}
        return solved(specs[request.param](), "average")

    def test_baselines_do_not_beat_the_optimum(self, network: Solved) -> None:
        policies = network.policies()
        report = simulate_policies(
            network.spec,
            network.model,
            policies,
            days=730,
            replications=100,
            rng=np.random.default_rng(404),
            warmup_days=50,
            reference="optimal",
            confidence=LEVEL,
        )
        reference = build_reference(network.spec)
        costs = np.array([lane.unit_cost for lane in network.spec.lanes])
        gains = {}
        for name, policy in policies.items():
            flows = network.model.flows[policy]
            reward, transition = reference.policy_chain(flows)
            # Reference: quantecon.MarkovChain stationary distribution pi of the brute-force
            # chain; long-run means are pi-weighted averages of what each state does.
            gains[name], pi = stationary_gain(reward, transition)
            outcome = report.outcome(name)
            assert pi @ flows.sum(axis=1) in outcome.units_moved_per_night
            assert pi @ (flows @ costs) in outcome.move_cost_per_day
        for name in ("balance", "nothing"):
            difference = report.outcome(name).difference_to_reference
            assert difference is not None
            # No policy earns more per day than an average-optimal one (Puterman 1994, ch. 8;
            # from memory): the paired difference is not significantly positive ...
            assert difference.low <= 0.0
            # ... and it estimates the exact difference of gains.
            assert gains[name] - gains["optimal"] in difference

    def test_balance_moves_toward_equal_cover_by_hand(self) -> None:
        # Equal mean demand (2 a day) at both sites, so equal cover is equal stock; lanes are
        # free and units sell for 10, so every move toward balance pays for itself. By hand:
        # from (6, 0) (covers 3 and 0 days, network 1.5) the lane limit of 2 allows (4, 2),
        # lowering the imbalance from 1.5^2 * 2 = 4.5 to 0.5^2 * 2 = 0.5 days^2. From (1, 4)
        # (network 1.25) one unit gives (2, 3) and two give (3, 2), both 0.25^2 * 2 = 0.125:
        # the tie goes to fewer units.
        spec = make_network(
            "equal demand",
            [
                location_json(
                    "a", 6, poisson(2.0), poisson(2.0), margin=10.0, holding=0.0, penalty=0.0
                ),
                location_json(
                    "b", 6, poisson(2.0), poisson(2.0), margin=10.0, holding=0.0, penalty=0.0
                ),
            ],
            [(0, 1, 0.0, 2), (1, 0, 0.0, 2)],
            discount=0.9,
        )
        model = build_transfer_model(spec)
        policy = balance_cover_policy(model, mean_demands(spec))[0]
        moves = model.flows[policy]
        assert tuple(moves[np.ravel_multi_index((6, 0), model.shape)]) == (2, 0)
        assert tuple(moves[np.ravel_multi_index((1, 4), model.shape)]) == (0, 1)
        # Balanced, or one unit apart (no move lowers the imbalance): nothing moves.
        for stock in [(3, 3), (4, 3), (0, 1)]:
            assert tuple(moves[np.ravel_multi_index(stock, model.shape)]) == (0, 0)

    def test_balance_moves_nothing_when_no_move_pays_for_itself(self) -> None:
        spec = far_apart_pair()
        model = build_transfer_model(spec)
        assert np.all(balance_cover_policy(model, mean_demands(spec))[0] == 0)


class TestCommonRandomNumbers:
    def test_same_seed_gives_the_same_report(self, kiosks: Solved) -> None:
        def run() -> Any:
            return simulate_policies(
                kiosks.spec,
                kiosks.model,
                kiosks.policies(),
                days=60,
                replications=30,
                rng=np.random.default_rng(99),
                reference="nothing",
            )

        assert run() == run()

    def test_two_copies_of_one_policy_differ_by_exactly_nothing(self, kiosks: Solved) -> None:
        policy = kiosks.result.action[0]
        report = simulate_policies(
            kiosks.spec,
            kiosks.model,
            {"first": policy, "second": policy.copy()},
            days=100,
            replications=50,
            rng=np.random.default_rng(7),
            reference="first",
        )
        assert report.outcome("second").difference_to_reference == Interval(0.0, 0.0, 0.0)
        first, second = report.outcomes
        assert dataclasses.replace(second, name="first") == first

    def test_a_policy_sees_the_same_days_whatever_runs_beside_it(self, kiosks: Solved) -> None:
        def run(policies: dict[str, NDArray[np.int64]]) -> Any:
            return simulate_policies(
                kiosks.spec,
                kiosks.model,
                policies,
                days=80,
                replications=20,
                rng=np.random.default_rng(3),
            )

        alone = run({"optimal": kiosks.result.action[0]})
        together = run(kiosks.policies())
        assert together.outcome("optimal") == alone.outcome("optimal")


class TestPeriodicPolicies:
    def test_one_row_period_is_the_stationary_policy(self, kiosks: Solved) -> None:
        def run(policy: NDArray[np.int64]) -> Any:
            return simulate_policies(
                kiosks.spec,
                kiosks.model,
                {"p": policy},
                days=40,
                replications=25,
                rng=np.random.default_rng(11),
            )

        assert run(kiosks.result.action[0][None, :]) == run(kiosks.result.action[0])

    @pytest.mark.parametrize(
        ("start_phase", "row"), [(0, "nothing"), (1, "optimal"), (2, "nothing")]
    )
    def test_day_t_uses_row_start_phase_plus_t(
        self, kiosks: Solved, start_phase: int, row: str
    ) -> None:
        stationary = {
            "nothing": do_nothing_policy(kiosks.model),
            "optimal": kiosks.result.action[0],
        }
        periodic = np.stack([stationary["nothing"], stationary["optimal"]])

        def one_day(policy: NDArray[np.int64], phase: int) -> Interval:
            # From (6, 0) the optimal policy moves units tonight, so the rows differ on day 0.
            return simulate_discounted_return(
                kiosks.spec,
                kiosks.model,
                policy,
                (6, 0),
                discount=0.9,
                days=1,
                replications=50,
                rng=np.random.default_rng(1),
                start_phase=phase,
            )

        assert kiosks.result.action[0][kiosks.index((6, 0))] != 0
        assert one_day(periodic, start_phase) == one_day(stationary[row], 0)


@dataclasses.dataclass(frozen=True)
class StationaryFigures:
    """Long-run figures of moving nothing, from each location's own chain: per location id,
    expected units sold and demanded per day and the probability of a stock-out day."""

    sold: dict[str, float]
    demanded: dict[str, float]
    short: dict[str, float]

    @property
    def fill_rate(self) -> float:
        return sum(self.sold.values()) / sum(self.demanded.values())

    @property
    def stockout_days(self) -> float:
        return float(np.mean(list(self.short.values())))


def stationary_figures(spec: NetworkSpec) -> StationaryFigures:
    sold, demanded, short = {}, {}, {}
    for location in spec.locations:
        kernel = location_transition_by_enumeration(location)
        # Reference: the stationary distribution is the eigenvector of K^T for eigenvalue 1
        # (numpy.linalg.eig), with K built by enumeration over scipy.stats laws.
        eigenvalues, eigenvectors = np.linalg.eig(kernel.T)
        pi = np.real(eigenvectors[:, np.argmin(np.abs(eigenvalues - 1.0))])
        pi = pi / pi.sum()
        d, pd = count_atoms(location.demand, location.capacity)
        y = np.arange(location.capacity + 1)
        # Stationary means: sales min(D, y), demand D, a stock-out day when D > y.
        sold[location.id] = float(pi @ (np.minimum(d[None, :], y[:, None]) @ pd))
        demanded[location.id] = float(d @ pd)
        short[location.id] = float(pi @ ((d[None, :] > y[:, None]) @ pd))
    return StationaryFigures(sold, demanded, short)


class TestDoNothingAgainstStationaryChains:
    """Moving nothing on a network whose lanes cost far more than a unit earns: each location
    is its own Markov chain, whose stationary distribution gives the long-run figures."""

    @pytest.fixture(scope="class")
    @classmethod
    def far(cls) -> Solved:
        far = solved(far_apart_pair(), "average")
        # A move costs 250 a unit against margins of 10 and 12: the optimal policy never moves.
        assert np.all(far.result.action[0] == 0)
        return far

    def test_fill_rate_and_stockout_days_match_the_stationary_distribution(
        self, far: Solved
    ) -> None:
        report = simulate_policies(
            far.spec,
            far.model,
            {"nothing": do_nothing_policy(far.model)},
            days=3_000,
            replications=40,
            rng=np.random.default_rng(8_128),
            warmup_days=100,
            confidence=LEVEL,
        )
        outcome = report.outcome("nothing")
        exact = stationary_figures(far.spec)
        for location in far.model.location_ids:
            # Fill rate = expected sales / expected demand in the stationary regime.
            fill_rate = exact.sold[location] / exact.demanded[location]
            assert fill_rate in outcome.fill_rate_by_location[location]
            assert exact.short[location] in outcome.stockout_days_by_location[location]
        assert exact.fill_rate in outcome.fill_rate
        assert exact.stockout_days in outcome.stockout_days

    def test_intervals_cover_the_exact_values_at_their_level(self, far: Solved) -> None:
        # Many short independent runs, each with its own 95% intervals: the number of intervals
        # that contain the exact value is binomial(RUNS, 0.95) when the intervals are right
        # (Student t for means, delta method for the fill rate; see solver.simulation).
        runs = 200
        exact = stationary_figures(far.spec)
        reward, transition = build_reference(far.spec).policy_chain(
            far.model.flows[do_nothing_policy(far.model)]
        )
        # Reference: quantecon.MarkovChain stationary distribution of the brute-force chain.
        gain = stationary_gain(reward, transition)[0]
        rng = np.random.default_rng(65_537)
        hits = {"profit": 0, "fill rate": 0, "stock-out days": 0}
        for _ in range(runs):
            outcome = simulate_policies(
                far.spec,
                far.model,
                {"nothing": do_nothing_policy(far.model)},
                days=150,
                replications=6,
                rng=rng,
                warmup_days=30,
            ).outcomes[0]
            hits["profit"] += gain in outcome.profit_per_day
            hits["fill rate"] += exact.fill_rate in outcome.fill_rate
            hits["stock-out days"] += exact.stockout_days in outcome.stockout_days
        # Reference: scipy.stats.binom, central 99.9% range of the number of hits.
        low, high = stats.binom(runs, 0.95).ppf([0.0005, 0.9995])
        for name, count in hits.items():
            assert low <= count <= high, (name, count, (low, high))


class TestInvalidInput:
    def run(self, kiosks: Solved, **changes: Any) -> None:
        arguments: dict[str, Any] = {
            "policies": {"p": kiosks.result.action[0]},
            "days": 10,
            "replications": 5,
            "rng": np.random.default_rng(0),
            **changes,
        }
        simulate_policies(kiosks.spec, kiosks.model, **arguments)

    @pytest.mark.parametrize(
        ("changes", "message"),
        [
            ({"days": 0}, "days must be at least 1"),
            ({"replications": 0}, "replications must be at least 1"),
            ({"warmup_days": -1}, "warmup_days must be at least 0"),
            ({"start_stock": (7, 0)}, "start stock at 'pier' is 7, outside 0..6"),
            ({"start_stock": (1, 2, 3)}, "start stock must be 2 whole numbers"),
            ({"reference": "best"}, "reference 'best' is not one of the policies"),
            ({"policies": {}}, "no policies to simulate"),
            ({"policies": {"p": np.zeros(5, dtype=np.int64)}}, "has shape (5,); expected (42,)"),
            ({"policies": {"p": np.zeros(42)}}, "must hold integer indices"),
            ({"policies": {"p": np.full(42, 10_000)}}, "outside the flow table"),
        ],
    )
    def test_bad_arguments_are_refused(
        self, kiosks: Solved, changes: dict[str, Any], message: str
    ) -> None:
        with pytest.raises(ValueError, match=re.escape(message)):
            self.run(kiosks, **changes)

    def test_a_flow_infeasible_somewhere_is_refused_with_the_state(self, kiosks: Solved) -> None:
        # A flow sending from the pier is infeasible where the pier is empty, state 0.
        sends = int(np.flatnonzero(kiosks.model.flow_out[:, 0] > 0)[0])
        policy = np.full(kiosks.model.n_states, sends, dtype=np.int64)
        with pytest.raises(ValueError, match=r"at closing stock \(pier=0, station=0\)"):
            self.run(kiosks, policies={"p": policy})

    def test_a_bad_row_of_a_periodic_policy_is_named(self, kiosks: Solved) -> None:
        bad = kiosks.result.action[0].copy()
        bad[3] = -1
        policy = np.stack([kiosks.result.action[0], bad])
        with pytest.raises(ValueError, match=r"policy 'p' \(row 1\) chooses flow -1"):
            self.run(kiosks, policies={"p": policy})

    def test_a_model_of_another_network_is_refused(self, kiosks: Solved) -> None:
        with pytest.raises(ValueError, match="not built from this specification"):
            simulate_policies(
                far_apart_pair(),
                kiosks.model,
                {"p": kiosks.result.action[0]},
                days=1,
                replications=1,
                rng=np.random.default_rng(0),
            )

    def test_discounted_return_checks_its_discount(self, kiosks: Solved) -> None:
        with pytest.raises(ValueError, match="discount must lie in"):
            simulate_discounted_return(
                kiosks.spec,
                kiosks.model,
                kiosks.result.action[0],
                (0, 0),
                discount=1.5,
                days=1,
                replications=1,
                rng=np.random.default_rng(0),
            )

    def test_cover_needs_positive_demand(self, kiosks: Solved) -> None:
        with pytest.raises(ValueError, match=r"positive mean demand .* 'station'"):
            balance_cover_policy(kiosks.model, [2.4, 0.0])
