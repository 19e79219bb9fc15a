"""Each unit's group (better, in line, worse than the benchmark) and rank, from posterior draws."""

from __future__ import annotations

import numpy as np

from pipeline.shrinkage.draws import evenly_thinned

RANK_DRAWS = 1000  # draws used for ranks


def _weighted_quantiles(
    values: np.ndarray, weights: np.ndarray, qs: tuple[float, ...]
) -> list[np.ndarray]:
    """Column-wise quantiles of ``values`` (draws, units) under normalised draw ``weights`` (one
    sort for all)."""
    order = np.argsort(values, axis=0)
    cumulative = np.cumsum(weights[order], axis=0)
    ordered = np.take_along_axis(values, order, axis=0)
    columns = np.arange(values.shape[1])
    return [ordered[np.argmax(cumulative >= q * cumulative[-1], axis=0), columns] for q in qs]


def group_units(
    rsr: np.ndarray,
    benchmark: float,
    better: str,
    rule: str,
    probability: float,
    lo_q: float,
    hi_q: float,
    weights: np.ndarray | None = None,
    interval: tuple[np.ndarray, np.ndarray] | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Each unit's group (better, typical, worse) and the posterior probability that it is on the
    other side.

    ``rule`` "interval": better or worse when the credible interval lies wholly on that side of the
    benchmark; "probability": when the posterior probability of that side is at least
    ``probability``. For a unit in line with the benchmark the "other side" is the less likely of
    the two.
    """
    if rsr.shape[1] == 0:
        return np.array([], dtype=object), np.array([])
    w = np.full(len(rsr), 1 / len(rsr)) if weights is None else weights / weights.sum()
    above, below = w @ (rsr > benchmark), w @ (rsr < benchmark)
    p_better, p_worse = (below, above) if better == "lower" else (above, below)
    if rule == "interval":
        lo, hi = interval if interval is not None else _weighted_quantiles(rsr, w, (lo_q, hi_q))
        is_below, is_above = hi < benchmark, lo > benchmark
        is_better, is_worse = (is_below, is_above) if better == "lower" else (is_above, is_below)
    else:
        is_better, is_worse = p_better >= probability, p_worse >= probability
    groups = np.where(is_better, "better", np.where(is_worse, "worse", "typical")).astype(object)
    other = np.where(
        is_better, p_worse, np.where(is_worse, p_better, np.minimum(p_better, p_worse))
    )
    return groups, other


def rank_summary(rsr: np.ndarray, better: str, lo_q: float, hi_q: float) -> np.ndarray:
    """Median rank and rank interval per unit among the reported units (rank 1 = best for patients),
    draw by draw.

    From at most RANK_DRAWS evenly spaced draws: enough for whole-number ranks, and fast at 10,000
    units.
    """
    if rsr.shape[1] == 0:
        return np.zeros((0, 3))
    rsr = rsr[evenly_thinned(len(rsr), RANK_DRAWS)]
    ranks = np.argsort(np.argsort(rsr if better == "lower" else -rsr, axis=1), axis=1) + 1
    return np.column_stack(
        [
            np.median(ranks, axis=0),
            np.quantile(ranks, lo_q, axis=0, method="lower"),
            np.quantile(ranks, hi_q, axis=0, method="higher"),
        ]
    )
