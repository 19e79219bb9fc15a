"""Posterior draws per unit from a shrinkage fit: each unit's ratio of predicted to expected at
the benchmark, and its effect, thinned to what the summaries need.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.special import expit

from pipeline.shrinkage.model import Cells, ShrinkageSpec, unit_estimates


@dataclass(frozen=True)
class UnitDraws:
    """Posterior draws per unit: the ratio P/E to the benchmark (benchmark.py) and the unit effect
    u."""

    ratio: np.ndarray  # (draws, units) P_i / E_i, E_i the published expected total at the benchmark
    effect: np.ndarray  # (draws, units) u_i on the link scale (departure from the typical unit)
    # (units,) standard error of each unit's intercept from its own data alone
    se: np.ndarray | None = None
    # (draws,) the typical unit's ratio (intercept mu): what small units are pulled towards
    typical: np.ndarray | None = None


def evenly_thinned(n: int, keep: int) -> np.ndarray:
    """Indexes of at most ``keep`` draws spread evenly over ``n``."""
    return np.linspace(0, n - 1, min(n, keep)).round().astype(int)


def unit_draws(
    cells: Cells,
    draws: dict[str, Any],
    max_draws: int = 4000,
    likelihood: str = "binomial",
    scale: float = 1.0,
) -> UnitDraws:
    """Predicted over expected per unit, draw by draw: P_i(mu + u_i) / P_i(0), where P_i(a) is the
    unit's predicted total with its intercept moved by a from the benchmark's (offsets hold the
    benchmark's intercept, so P_i(0) is the published expected total E_i).

    Log links: exp(mu + u_i) times ``scale`` (log-normal: the within-unit over the network smearing
    factor, so that P_i and E_i are on the same scale). The typical unit's ratio uses mu alone,
    summed over the whole network.
    """
    mu, u = draws["mu"], draws["u"]
    keep = evenly_thinned(len(mu), max_draws)  # evenly thinned: the summaries need no more
    mu, u = mu[keep], u[keep]
    missing = np.setdiff1d(np.arange(cells.n_units), cells.unit)  # units without data have no ratio
    curves = draws.get("curves")
    if curves is not None:  # information at the centre, without the curves' small ridge
        se = 1 / np.sqrt(np.maximum(1 / curves.se**2 - 0.25, 1e-12))
    else:
        se = unit_estimates(ShrinkageSpec(likelihood=likelihood), cells)[1]
    se[missing] = np.inf
    a = mu[:, None] + u
    if likelihood != "binomial":
        ratio = np.exp(a) * scale
        ratio[:, missing] = np.nan
        return UnitDraws(ratio=ratio, effect=u, se=se, typical=np.exp(mu) * scale)
    if curves is not None:  # from each unit's series of log P_i (curves.py)
        present = np.setdiff1d(np.arange(cells.n_units), missing)
        log_expected = curves.log_predicted(np.zeros(cells.n_units))
        ratio = np.exp(curves.log_predicted(a) - log_expected)
        at_mu = np.exp(
            curves.log_predicted(np.repeat(mu[:, None], cells.n_units, axis=1))[:, present]
        )
        typical = at_mu.sum(axis=1) / np.exp(log_expected[present]).sum()
        ratio[:, missing] = np.nan
        return UnitDraws(ratio=ratio, effect=u, se=se, typical=typical)
    ratio = np.full(u.shape, np.nan)
    order = np.argsort(cells.unit, kind="stable")
    bounds = np.searchsorted(cells.unit[order], np.arange(cells.n_units + 1))
    for i in range(cells.n_units):
        idx = order[bounds[i] : bounds[i + 1]]
        if len(idx) == 0:
            continue
        off, n = cells.offset[idx], cells.n[idx]
        ratio[:, i] = (expit(a[:, i, None] + off[None, :]) @ n) / (expit(off) @ n)
    typical = (expit(mu[:, None] + cells.offset[None, :]) @ cells.n) / (
        expit(cells.offset) @ cells.n
    )
    return UnitDraws(ratio=ratio, effect=u, se=se, typical=typical)
