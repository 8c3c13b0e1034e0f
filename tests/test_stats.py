"""Group statistics on fixed data, each against an independent computation:
exact permutation enumeration, pair counting by hand, a Holm adjustment done
by hand, scipy.stats.bootstrap, scipy.stats.mannwhitneyu."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import stats as sps

from waves.errors import WavesError
from waves.stats import (
    aggregate_replicates,
    cliffs_delta,
    compare_groups,
    compare_metrics,
    holm,
    mann_whitney,
    median_difference_ci,
)

X = np.array([7.9, 8.4, 8.1, 9.0, 8.7])
Y = np.array([7.1, 7.6, 8.2, 7.4, 7.0, 7.8])


def _u_by_pairs(x, y) -> float:
    # definition of U: pairs with x > y, ties count one half (Mann & Whitney 1947, from memory)
    return sum(1.0 if a > b else 0.5 if a == b else 0.0 for a in x for b in y)


def test_u_and_exact_p_match_permutation_enumeration():
    u, p, method = mann_whitney(X, Y)
    assert method == "exact"
    assert u == _u_by_pairs(X, Y)  # counted pair by pair: independent of ranks
    # exact two-sided p: enumerate every split of the pooled values (the
    # permutation null; common practice, no source); |U - n1 n2 / 2| as extreme
    pooled = np.concatenate([X, Y])
    centre = X.size * Y.size / 2.0
    extreme = 0
    total = 0
    for idx in itertools.combinations(range(pooled.size), X.size):
        mask = np.zeros(pooled.size, bool)
        mask[list(idx)] = True
        uu = _u_by_pairs(pooled[mask], pooled[~mask])
        extreme += abs(uu - centre) >= abs(u - centre) - 1e-12
        total += 1
    assert total == math.comb(11, 5)
    assert p == pytest.approx(extreme / total, rel=1e-12)


def test_asymptotic_p_with_ties_matches_scipy():
    x = np.array([1, 2, 2, 3, 3, 3, 4, 5, 5, 6, 7, 8], float)
    y = np.array([2, 3, 4, 4, 5, 6, 6, 7, 8, 8, 9, 9, 10], float)
    u, p, method = mann_whitney(x, y)
    assert method == "asymptotic"
    ref = sps.mannwhitneyu(x, y, alternative="two-sided", method="asymptotic")  # reference library
    assert u == ref.statistic == _u_by_pairs(x, y)
    assert p == pytest.approx(ref.pvalue, rel=1e-12)
    # normal approximation written out: tie-corrected variance, continuity
    # correction 0.5 (Lehmann, Nonparametrics, from memory)
    n1, n2 = x.size, y.size
    _, counts = np.unique(np.concatenate([x, y]), return_counts=True)
    n = n1 + n2
    var = n1 * n2 / 12.0 * ((n + 1) - (counts**3 - counts).sum() / (n * (n - 1)))
    z = (abs(u - n1 * n2 / 2.0) - 0.5) / math.sqrt(var)
    assert p == pytest.approx(2 * sps.norm.sf(z), rel=1e-9)


def test_cliffs_delta_counts_pairs():
    x = np.array([3.0, 5.0, 5.0, 9.0])
    y = np.array([1.0, 5.0, 6.0])
    greater = sum(a > b for a in x for b in y)
    less = sum(a < b for a in x for b in y)
    # Cliff 1993 definition (from memory): (#greater - #less) / (n1 n2)
    assert cliffs_delta(x, y) == pytest.approx((greater - less) / (x.size * y.size), abs=1e-15)
    # by hand: x=3 beats 1, loses to 5, 6; each x=5 beats 1, ties 5, loses to 6; x=9 beats all
    assert cliffs_delta(x, y) == pytest.approx((6 - 4) / 12, abs=1e-15)
    assert cliffs_delta([10, 11], [1, 2, 3]) == 1.0
    assert cliffs_delta([1, 2, 3], [10, 11]) == -1.0
    assert math.isnan(cliffs_delta([], [1.0]))


def test_holm_matches_hand_computation():
    # by hand: sorted 0.005 0.01 0.03 0.04 times 4 3 2 1 = 0.02 0.03 0.06 0.04,
    # then running maximum: 0.02 0.03 0.06 0.06 (Holm 1979 step-down, from memory)
    adj = holm([0.01, 0.04, 0.03, 0.005])
    np.testing.assert_allclose(adj, [0.03, 0.06, 0.06, 0.02], rtol=1e-12)
    # capped at 1, NaN ignored and kept
    adj = holm([0.5, np.nan, 0.4])
    np.testing.assert_allclose(adj, [0.8, np.nan, 0.8], rtol=1e-12)
    np.testing.assert_allclose(holm([0.7, 0.9]), [1.0, 1.0])
    assert holm([]).size == 0
    with pytest.raises(WavesError):
        holm([1.5])


def test_holm_never_below_raw_and_equals_bonferroni_for_the_smallest(rng):
    p = rng.uniform(0, 0.2, size=17)
    adj = holm(p)
    assert np.all(adj >= p - 1e-15)
    i = np.argmin(p)
    assert adj[i] == pytest.approx(min(1.0, 17 * p[i]))  # step one of Holm = Bonferroni


def test_bootstrap_interval_matches_scipy_bootstrap(rng):
    x = rng.normal(10.0, 1.0, 25)
    y = rng.normal(8.0, 1.5, 30)
    lo, hi = median_difference_ci(x, y, n_boot=8000, seed=1)
    ref = sps.bootstrap(
        (x, y),
        lambda a, b, axis=-1: np.median(a, axis=axis) - np.median(b, axis=axis),
        n_resamples=8000,
        method="percentile",
        vectorized=True,
        paired=False,
        random_state=np.random.default_rng(2),
    ).confidence_interval  # reference library, different random stream
    width = ref.high - ref.low
    # Monte-Carlo error of an 8000-resample percentile: a few % of the width (common practice, no source)
    assert lo == pytest.approx(ref.low, abs=0.1 * width)
    assert hi == pytest.approx(ref.high, abs=0.1 * width)
    assert lo < np.median(x) - np.median(y) < hi


def test_bootstrap_is_seeded_and_checks_input():
    a = median_difference_ci(X, Y, seed=5)
    assert a == median_difference_ci(X, Y, seed=5)
    assert all(math.isnan(v) for v in median_difference_ci([], Y))
    with pytest.raises(WavesError, match="at least 100"):
        median_difference_ci(X, Y, n_boot=10)
    with pytest.raises(WavesError, match="between 0 and 1"):
        median_difference_ci(X, Y, level=95)


def test_aggregate_replicates_by_hand():
    v = [1.0, 3.0, 2.0, 10.0, np.nan, 4.0, np.nan]
    g = ["a", "a", "a", "a", "b", "b", "b"]
    r = ["1", "1", "1", "2", "1", "1", "2"]
    med, grp = aggregate_replicates(v, g, r)
    # (a,1): median(1,3,2) = 2; (a,2): 10; (b,1): 4 (NaN dropped); (b,2): none
    np.testing.assert_array_equal(med, [2.0, 10.0, 4.0])
    assert list(grp) == ["a", "a", "b"]


def test_compare_groups_on_fixed_data():
    values = np.concatenate([Y, X, Y + 0.05])
    groups = ["wt"] * Y.size + ["mut"] * X.size + ["wt2"] * Y.size
    rows = compare_groups(values, groups, reference="wt", metric="period_min", seed=3)
    assert [c.group for c in rows] == ["mut", "wt2"]
    mut = rows[0]
    assert mut.median == np.median(X) and mut.median_reference == np.median(Y)
    assert mut.difference == pytest.approx(np.median(X) - np.median(Y))
    ref = sps.mannwhitneyu(X, Y, alternative="two-sided")  # reference library
    assert mut.p_value == pytest.approx(ref.pvalue)
    assert mut.u_statistic == ref.statistic
    # Holm over the two comparisons, by hand
    p = sorted([rows[0].p_value, rows[1].p_value])
    expect_small = min(1.0, 2 * p[0])
    expect_large = max(expect_small, p[1])
    assert sorted([rows[0].p_holm, rows[1].p_holm]) == pytest.approx([expect_small, expect_large])
    assert mut.ci_low <= mut.difference <= mut.ci_high
    assert mut.level == "stack" and mut.n == X.size and mut.n_reference == Y.size


def test_compare_groups_with_replicates_tests_replicate_medians():
    values = [1.0, 1.2, 5.0, 2.0, 2.2, 6.0, 9.0, 9.5, 8.0]
    groups = ["a"] * 3 + ["a"] * 3 + ["b"] * 3
    reps = ["1", "1", "2", "3", "3", "4", "1", "2", "3"]
    (c,) = compare_groups(values, groups, reference="a", replicates=reps)
    assert c.level == "replicate"
    # replicate medians by hand: a: 1.1, 5.0, 2.1, 6.0 ; b: 9.0, 9.5, 8.0
    assert c.n == 3 and c.n_reference == 4
    assert c.median_reference == pytest.approx(np.median([1.1, 5.0, 2.1, 6.0]))
    assert c.p_value == pytest.approx(
        sps.mannwhitneyu([9.0, 9.5, 8.0], [1.1, 5.0, 2.1, 6.0]).pvalue  # reference library
    )


def test_compare_metrics_families_and_errors():
    table = {
        "group": ["wt"] * 6 + ["mut"] * 5 + ["x"] * 3,
        "a": list(Y) + list(X) + [7.0, 7.1, 7.2],
        "b": list(Y) + [None] * 5 + [1.0, 2.0, 3.0],
    }
    per_metric = compare_metrics(table, ["a", "b"], reference="wt")
    everything = compare_metrics(table, ["a", "b"], reference="wt", holm_family="all")
    assert len(per_metric) == 4
    b_mut = [c for c in per_metric if c.metric == "b" and c.group == "mut"][0]
    assert b_mut.n == 0 and math.isnan(b_mut.p_value) and math.isnan(b_mut.p_holm)
    finite = [c.p_value for c in everything if math.isfinite(c.p_value)]
    np.testing.assert_allclose(
        sorted(c.p_holm for c in everything if math.isfinite(c.p_value)), sorted(holm(finite))
    )
    with pytest.raises(WavesError, match="reference group 'nope'"):
        compare_metrics(table, ["a"], reference="nope")
    with pytest.raises(WavesError, match="no metric"):
        compare_metrics(table, ["zz"], reference="wt")
    with pytest.raises(WavesError, match="holm_family"):
        compare_metrics(table, ["a"], reference="wt", holm_family="bonf")


def test_equal_values_give_p_one():
    u, p, method = mann_whitney([2.0, 2.0], [2.0, 2.0, 2.0])
    assert p == 1.0 and u == 3.0 and method == "all-equal"
