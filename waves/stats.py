"""Group statistics of a screen: each group against a reference group, per metric.

Functions on plain arrays (NaN = not measured, dropped):

- `median_difference_ci`: percentile bootstrap interval of
  median(group) - median(reference), each sample resampled with replacement
  on its own, from a seeded numpy Generator.
- `mann_whitney`: two-sided Mann-Whitney U test (scipy.stats.mannwhitneyu;
  the exact distribution when the smaller sample has at most 8 values and
  there are no ties, else the normal approximation with tie and continuity
  corrections: scipy's own 'auto' rule, made explicit so it can be reported).
- `cliffs_delta`: P(X > Y) - P(X < Y) over all pairs, computed from ranks
  (delta = 2 U / (n1 n2) - 1, the rank-biserial correlation); +1 means every
  stack of the group lies above every stack of the reference.
- `holm`: Holm's step-down adjustment of a family of p-values.
- `aggregate_replicates`: the median of each (group, replicate) first, so a
  replicate (a day, a plate) counts once however many stacks it holds.
- `compare_groups`: all of it for one metric; `compare_metrics` for a table,
  Holm-adjusted per metric across the groups (or across everything).

p-values here are descriptive numbers for a research screen, not a clinical,
diagnostic or regulatory judgement.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from waves.errors import WavesError

__all__ = [
    "Comparison",
    "finite_values",
    "median_difference_ci",
    "mann_whitney",
    "cliffs_delta",
    "holm",
    "aggregate_replicates",
    "compare_groups",
    "compare_metrics",
    "HOLM_FAMILIES",
]

HOLM_FAMILIES = ("metric", "all")
_BOOT_CHUNK_VALUES = 4_000_000  # resampled values held at once


@dataclass(frozen=True)
class Comparison:
    """One group against the reference for one metric.

    level: 'stack' (one value per stack) or 'replicate' (one median per
    replicate).  n, n_reference: values used (finite).  difference =
    median - median_reference, in the metric's unit; ci_low, ci_high: its
    bootstrap interval at `ci_level`.  p_value: two-sided Mann-Whitney U;
    p_holm: Holm-adjusted within the family; NaN when a side has no value.
    """

    metric: str
    group: str
    reference: str
    level: str
    n: int
    n_reference: int
    median: float
    median_reference: float
    difference: float
    ci_low: float
    ci_high: float
    ci_level: float
    u_statistic: float
    p_value: float
    p_holm: float
    cliffs_delta: float
    test_method: str

    def as_row(self) -> dict:
        return {
            "metric": self.metric,
            "group": self.group,
            "reference": self.reference,
            "level": self.level,
            "n": self.n,
            "n_reference": self.n_reference,
            "median": self.median,
            "median_reference": self.median_reference,
            "difference": self.difference,
            "ci_low": self.ci_low,
            "ci_high": self.ci_high,
            "ci_level": self.ci_level,
            "u_statistic": self.u_statistic,
            "p_value": self.p_value,
            "p_holm": self.p_holm,
            "cliffs_delta": self.cliffs_delta,
            "test_method": self.test_method,
        }


def finite_values(values) -> np.ndarray:
    """float64 1-D copy of `values` without NaN (not measured) entries."""
    a = np.asarray(values, dtype=np.float64).ravel()
    return a[np.isfinite(a)]


def _median(a: np.ndarray) -> float:
    return float(np.median(a)) if a.size else math.nan


def _check_level(level: float) -> float:
    level = float(level)
    if not 0.0 < level < 1.0:
        raise WavesError(f"confidence level must be between 0 and 1 (e.g. 0.95), got {level!r}")
    return level


def median_difference_ci(
    group,
    reference,
    *,
    n_boot: int = 2000,
    level: float = 0.95,
    seed: int = 0,
) -> tuple[float, float]:
    """Percentile bootstrap interval of median(group) - median(reference).

    Each sample is resampled with replacement independently, `n_boot` times,
    from numpy's default Generator seeded with `seed`.  Returns (low, high)
    in the values' unit; (nan, nan) when a sample is empty.
    """
    level = _check_level(level)
    if int(n_boot) < 100:
        raise WavesError(f"the bootstrap needs at least 100 resamples, got {n_boot!r}")
    x, y = finite_values(group), finite_values(reference)
    if x.size == 0 or y.size == 0:
        return math.nan, math.nan
    rng = np.random.default_rng(seed)
    n_boot = int(n_boot)
    diffs = np.empty(n_boot, dtype=np.float64)
    step = max(1, _BOOT_CHUNK_VALUES // max(x.size, y.size))
    for b0 in range(0, n_boot, step):
        b1 = min(n_boot, b0 + step)
        mx = np.median(x[rng.integers(0, x.size, size=(b1 - b0, x.size))], axis=1)
        my = np.median(y[rng.integers(0, y.size, size=(b1 - b0, y.size))], axis=1)
        diffs[b0:b1] = mx - my
    alpha = 1.0 - level
    low, high = np.quantile(diffs, [alpha / 2.0, 1.0 - alpha / 2.0])
    return float(low), float(high)


def mann_whitney(group, reference) -> tuple[float, float, str]:
    """Two-sided Mann-Whitney U test of `group` against `reference`.

    Returns (U of the group, p-value, method), method 'exact' (smaller
    sample <= 8 values, no ties) or 'asymptotic'; (nan, nan, 'none') when a side
    is empty.  When every value is equal there is nothing to rank: p = 1.
    """
    from scipy import stats

    x, y = finite_values(group), finite_values(reference)
    if x.size == 0 or y.size == 0:
        return math.nan, math.nan, "none"
    if np.all(np.concatenate([x, y]) == x[0]):
        return x.size * y.size / 2.0, 1.0, "all-equal"
    has_ties = np.unique(np.concatenate([x, y])).size < x.size + y.size
    method = "exact" if (min(x.size, y.size) <= 8 and not has_ties) else "asymptotic"
    res = stats.mannwhitneyu(x, y, alternative="two-sided", method=method)
    return float(res.statistic), float(res.pvalue), method


def cliffs_delta(group, reference) -> float:
    """Cliff's delta: (#pairs x > y - #pairs x < y) / (n1 n2), from ranks.

    Equals 2 U / (n1 n2) - 1 with U the Mann-Whitney statistic of `group`
    (ties count one half), so it is the rank-biserial correlation.  NaN when
    a side is empty.
    """
    from scipy.stats import rankdata

    x, y = finite_values(group), finite_values(reference)
    if x.size == 0 or y.size == 0:
        return math.nan
    ranks = rankdata(np.concatenate([x, y]))
    u = ranks[: x.size].sum() - x.size * (x.size + 1) / 2.0
    return float(2.0 * u / (x.size * y.size) - 1.0)


def holm(pvalues) -> np.ndarray:
    """Holm's step-down adjusted p-values, in the input order.

    Sorted ascending, p_(i) becomes max_{j <= i} min(1, (m - j + 1) p_(j)),
    m the number of finite p-values; NaN entries stay NaN and do not count.
    """
    p = np.asarray(pvalues, dtype=np.float64).ravel()
    out = np.full(p.shape, np.nan)
    ok = np.flatnonzero(np.isfinite(p))
    if ok.size == 0:
        return out
    if np.any((p[ok] < 0) | (p[ok] > 1)):
        raise WavesError("p-values must lie between 0 and 1")
    m = ok.size
    order = ok[np.argsort(p[ok], kind="stable")]
    running = 0.0
    for i, idx in enumerate(order):
        running = max(running, min(1.0, (m - i) * p[idx]))
        out[idx] = running
    return out


def aggregate_replicates(values, groups, replicates) -> tuple[np.ndarray, np.ndarray]:
    """Median of the finite values of each (group, replicate) pair.

    Returns (medians, group of each median), in order of first appearance.
    A replicate with no finite value is left out.
    """
    v = np.asarray(values, dtype=np.float64).ravel()
    g = np.asarray(groups, dtype=object).ravel()
    r = np.asarray(replicates, dtype=object).ravel()
    if not (v.size == g.size == r.size):
        raise WavesError("values, groups and replicates must have the same length")
    cells: dict[tuple[str, str], list[float]] = {}
    for vi, gi, ri in zip(v, g, r, strict=True):
        cells.setdefault((str(gi), str(ri)), [])
        if math.isfinite(vi):
            cells[(str(gi), str(ri))].append(float(vi))
    med, grp = [], []
    for (gi, _ri), vals in cells.items():
        if vals:
            med.append(float(np.median(vals)))
            grp.append(gi)
    return np.asarray(med, dtype=np.float64), np.asarray(grp, dtype=object)


def compare_groups(
    values,
    groups,
    *,
    reference: str,
    metric: str = "value",
    replicates=None,
    n_boot: int = 2000,
    ci_level: float = 0.95,
    seed: int = 0,
) -> tuple[Comparison, ...]:
    """Every group against `reference` for one metric (a value per stack).

    replicates: a label per stack (None: none); when given, stacks are
    first reduced to one median per (group, replicate) and the tests run on
    those.  p_holm is adjusted across the returned comparisons.  Groups are
    in order of first appearance.
    """
    v = np.asarray(values, dtype=np.float64).ravel()
    g = np.asarray([str(x) for x in np.asarray(groups, dtype=object).ravel()], dtype=object)
    if v.size != g.size:
        raise WavesError(f"{metric}: {v.size} values but {g.size} group labels")
    names = list(dict.fromkeys(g.tolist()))
    reference = str(reference)
    if reference not in names:
        raise WavesError(
            f"reference group {reference!r} is not in the sheet; groups are {', '.join(names)}: "
            "give one of them with --reference"
        )
    level = "stack"
    if replicates is not None:
        v, g = aggregate_replicates(v, g, replicates)
        level = "replicate"
    ref = v[g == reference]
    rows = []
    for k, name in enumerate(n for n in names if n != reference):
        x = v[g == name]
        xf, rf = finite_values(x), finite_values(ref)
        lo, hi = median_difference_ci(xf, rf, n_boot=n_boot, level=ci_level, seed=seed + k)
        u, p, method = mann_whitney(xf, rf)
        rows.append(
            Comparison(
                metric=metric,
                group=name,
                reference=reference,
                level=level,
                n=int(xf.size),
                n_reference=int(rf.size),
                median=_median(xf),
                median_reference=_median(rf),
                difference=_median(xf) - _median(rf),
                ci_low=lo,
                ci_high=hi,
                ci_level=float(ci_level),
                u_statistic=u,
                p_value=p,
                p_holm=math.nan,
                cliffs_delta=cliffs_delta(xf, rf),
                test_method=method,
            )
        )
    adjusted = holm([c.p_value for c in rows])
    return tuple(_with_holm(c, a) for c, a in zip(rows, adjusted, strict=True))


def _with_holm(c: Comparison, p_holm: float) -> Comparison:
    from dataclasses import replace

    return replace(c, p_holm=float(p_holm))


def compare_metrics(
    table: dict,
    metrics,
    *,
    group_column: str = "group",
    reference: str,
    replicate_column: str | None = None,
    n_boot: int = 2000,
    ci_level: float = 0.95,
    seed: int = 0,
    holm_family: str = "metric",
) -> tuple[Comparison, ...]:
    """`compare_groups` for each metric column of a column table.

    table: {column: sequence}, one entry per stack; metric columns numeric
    (None / NaN = not measured).  holm_family: 'metric' adjusts across the
    groups of each metric; 'all' across every comparison returned.
    """
    if holm_family not in HOLM_FAMILIES:
        raise WavesError(f"holm_family must be one of {HOLM_FAMILIES}, got {holm_family!r}")
    if group_column not in table:
        raise WavesError(f"the table has no {group_column!r} column")
    reps = None
    if replicate_column is not None:
        if replicate_column not in table:
            raise WavesError(f"the table has no {replicate_column!r} column")
        reps = list(table[replicate_column])
    out: list[Comparison] = []
    for i, metric in enumerate(metrics):
        if metric not in table:
            raise WavesError(f"no metric {metric!r} in the table; known columns: {', '.join(table)}")
        vals = np.asarray([math.nan if x is None else float(x) for x in table[metric]], dtype=np.float64)
        out.extend(
            compare_groups(
                vals,
                table[group_column],
                reference=reference,
                metric=metric,
                replicates=reps,
                n_boot=n_boot,
                ci_level=ci_level,
                seed=seed + 1000 * i,
            )
        )
    if holm_family == "all":
        adjusted = holm([c.p_value for c in out])
        out = [_with_holm(c, a) for c, a in zip(out, adjusted, strict=True)]
    return tuple(out)
