"""Does the case-mix adjustment stay unbiased when sicker units are also worse (or better)?

Simulated networks (invented) where each unit's patient severity and its true quality are
correlated. Three ways to bring case mix into the shrinkage fit are compared on the same data:

* pooled  - risk coefficients from one logistic fit without unit terms, then an offset;
* within  - risk coefficients with unit indicators present, then an offset (fairgauge);
* joint   - risk coefficients and unit effects sampled together in one PyMC model.

For each: error of the estimated risk coefficient, bias of log(adjusted ratio) against the truth
along unit severity (the slope; 0 is unbiased), root-mean-square error, 95% interval coverage, and
wall time.

    python benchmarks/offset_bias.py [--networks 3]
"""

from __future__ import annotations

import argparse
import time
import warnings
from functools import partial

import numpy as np
import pandas as pd
from scipy.special import expit

from pipeline.casemix.model import fit_casemix
from pipeline.config import MeasureSection, SamplerSection
from pipeline.shrinkage.draws import unit_draws
from pipeline.shrinkage.model import Cells, ShrinkageSpec
from pipeline.shrinkage.sampling import Sampler

warnings.filterwarnings("ignore")
MEASURE = MeasureSection(key="sim", name="sim", definition="sim", outcome="y", casemix="x + z")
TRUE_B_X = 0.7
SETTINGS = SamplerSection(chains=4, draws=1000, tune=1000, cores=2, seed=1)


def simulate(seed: int, n_units: int = 40):
    rng = np.random.default_rng(seed)
    sizes = np.round(np.exp(rng.uniform(np.log(30), np.log(1500), n_units))).astype(int)
    severity = rng.normal(0, 1, n_units)
    effect = 0.3 * severity + rng.normal(0, 0.2, n_units)
    effect -= effect.mean()
    unit = np.repeat(np.arange(n_units), sizes)
    x = np.round(rng.normal(severity[unit], 1.0), 1)  # rounded like a recorded score
    z = (rng.random(len(unit)) < 0.4).astype(int)
    base = -2.0 + TRUE_B_X * x + 0.4 * z
    y = (rng.random(len(unit)) < expit(base + effect[unit])).astype(int)
    frame = (
        pd.DataFrame({"u": unit, "p": expit(base + effect[unit]), "e": expit(base)})
        .groupby("u")
        .sum()
    )
    return (
        pd.DataFrame({"x": x, "z": z, "y": y}),
        unit,
        severity,
        (frame["p"] / frame["e"]).to_numpy(),
    )


def two_stage(rows, unit, n_units, within: bool, sampler: Sampler):
    codes = unit if within else np.zeros(len(unit), dtype=np.int64)
    fit = fit_casemix(MEASURE, rows, codes)
    cells = Cells.from_patients(
        unit, fit.intercept + fit.linear, rows["y"].to_numpy(float), n_units
    )
    draws, _ = sampler.run(cells, seed=3)
    return unit_draws(cells, draws).ratio, float(fit.coefficients.loc["x", "estimate"])


def joint(rows, unit, n_units):
    import nutpie
    import pymc as pm
    import pytensor.tensor as pt

    frame = pd.DataFrame({"u": unit, "x": rows["x"], "z": rows["z"], "y": rows["y"]})
    cells = frame.groupby(["u", "x", "z"])["y"].agg(["size", "sum"]).reset_index()
    with pm.Model() as model:
        c = pm.Normal("c", -2, 2)
        b = pm.Normal("b", 0, 2, shape=2)
        tau = pm.HalfNormal("tau", 1)
        zz = pm.Normal("zz", 0, 1, shape=n_units)
        eta = (
            c
            + b[0] * cells["x"].to_numpy()
            + b[1] * cells["z"].to_numpy()
            + tau * zz[cells["u"].to_numpy()]
        )
        pm.Potential(
            "ll",
            pt.sum(cells["sum"].to_numpy() * eta - cells["size"].to_numpy() * pt.softplus(eta)),
        )
    idata = nutpie.sample(
        nutpie.compile_pymc_model(model),
        draws=1000,
        tune=1000,
        chains=4,
        cores=2,
        seed=3,
        progress_bar=False,
        low_rank_modified_mass_matrix=True,
    )
    post = idata.posterior
    cc, bb = post["c"].values.reshape(-1), post["b"].values.reshape(-1, 2)
    u = (post["tau"].values[..., None] * post["zz"].values).reshape(-1, n_units)
    keep = np.linspace(0, len(cc) - 1, 1000).astype(int)
    ratio = np.empty((len(keep), n_units))
    lin = np.outer(bb[keep, 0], rows["x"]) + np.outer(bb[keep, 1], rows["z"]) + cc[keep, None]
    for i in range(n_units):
        m = unit == i
        ratio[:, i] = expit(lin[:, m] + u[keep, i, None]).sum(1) / expit(lin[:, m]).sum(1)
    return ratio, float(bb[:, 0].mean())


def score(ratio, truth, severity):
    est = np.log(np.median(ratio, axis=0))
    err = est - np.log(truth)
    lo, hi = np.quantile(ratio, [0.025, 0.975], axis=0)
    return {
        "bias_slope": float(np.polyfit(severity, err, 1)[0]),
        "rmse": float(np.sqrt(np.mean(err**2))),
        "coverage": float(np.mean((lo <= truth) & (truth <= hi))),
    }


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--networks", type=int, default=3)
    args = parser.parse_args()
    sampler = Sampler(ShrinkageSpec(), SETTINGS)
    rows_out = []
    for seed in range(args.networks):
        rows, unit, severity, truth = simulate(seed)
        n_units = len(truth)
        for name, run in [
            ("pooled", partial(two_stage, rows, unit, n_units, False, sampler)),
            ("within", partial(two_stage, rows, unit, n_units, True, sampler)),
            ("joint", partial(joint, rows, unit, n_units)),
        ]:
            start = time.perf_counter()
            ratio, b_x = run()
            rows_out.append(
                {
                    "network": seed,
                    "method": name,
                    "b_x_error": b_x - TRUE_B_X,
                    **score(ratio, truth, severity),
                    "seconds": time.perf_counter() - start,
                }
            )
            print(rows_out[-1], flush=True)
    table = pd.DataFrame(rows_out)
    print(
        f"\n{len(table) // 3} simulated networks, {len(truth)} units each, severity-quality "
        "correlation built in"
    )
    print(
        table.groupby("method")[["b_x_error", "bias_slope", "rmse", "coverage", "seconds"]]
        .mean()
        .round(3)
        .to_string()
    )
    print(
        "b_x_error: estimated minus true risk coefficient (0.7); bias_slope: slope of "
        "log-ratio error on unit severity"
    )


if __name__ == "__main__":
    main()
