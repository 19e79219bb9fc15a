"""What small units are pulled towards: interval coverage with and without unit-level predictors.

Invented networks of 200 units (sizes 20 to 3,000 patients, log-uniform), two kinds:

* ``severity``: a unit's quality tracks its patients' severity (true log-odds effect 0.4 x the
  unit's mean severity, plus noise), the case where an exchangeable prior pulls those units towards
  the network (Mundlak 1978 for the remedy, from memory);
* ``volume``: small units are truly worse (effect -0.25 per unit of log cases, plus noise), a
  volume-outcome relationship (common practice in surgery, no source).

Each network runs the real pipeline steps: the within-unit case-mix fit, offsets at the
benchmark (benchmark.py), the shrinkage fit with one common target and with
``pull_towards = ["log_cases", "case_mix"]`` (targets.py), and the per-unit ratios P / E. The
truth is each unit's true ratio: its patients' true expected events over its published E. Printed
per kind and model: 95% and 90% interval coverage of the true ratios, RMSE of log ratio, and of
the small units (below 150 cases) that are truly worse (true ratio above 1.25) how many are
flagged (95% interval above 1). One line per figure, then a summary line.

    python benchmarks/coverage_target.py [--networks 4] [--units 200]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd
from scipy.special import expit

from pipeline.casemix.benchmark import benchmark_offset
from pipeline.casemix.model import fit_with_design
from pipeline.config import MeasureSection, SamplerSection
from pipeline.inputs.targets import design
from pipeline.shrinkage.draws import unit_draws
from pipeline.shrinkage.model import Cells, ShrinkageSpec
from pipeline.shrinkage.sampling import Sampler

SMALL = 150
WORSE = 1.25
PREDICTORS = ("log_cases", "case_mix")


def invent(kind: str, units: int, seed: int):
    rng = np.random.default_rng(seed)
    sizes = np.round(np.exp(rng.uniform(np.log(20), np.log(3000), units))).astype(int)
    unit = np.repeat(np.arange(units), sizes)
    severity = rng.normal(0, 0.5, units)
    x = np.column_stack(
        [
            rng.normal(severity[unit], 1.0),
            (rng.random(len(unit)) < expit(-1 + severity[unit])).astype(float),
        ]
    )
    if kind == "severity":
        effect = 0.4 * severity + rng.normal(0, 0.2, units)
    else:
        effect = -0.25 * (np.log(sizes) - np.log(sizes).mean()) + rng.normal(0, 0.2, units)
    logit = -2.2 + x @ np.array([0.5, 0.6]) + effect[unit]
    y = (rng.random(len(unit)) < expit(logit)).astype(float)
    return x, y, unit, sizes, expit(logit)


def one_network(kind: str, units: int, seed: int, samplers: dict) -> dict[str, dict[str, float]]:
    x, y, unit, sizes, p_true = invent(kind, units, seed)
    rows = pd.DataFrame(x, columns=["x1", "x2"]).assign(y=y)
    measure = MeasureSection(
        key="bench", name="Bench", definition="d", outcome="y", casemix="x1 + x2"
    )
    casemix, _, y_used = fit_with_design(measure, rows, unit)
    offset, expected, _ = benchmark_offset("network", measure, casemix, y_used, unit)
    e_unit = np.bincount(unit, weights=expected, minlength=units)
    true_ratio = np.bincount(unit, weights=p_true, minlength=units) / e_unit
    plain = Cells.from_patients(unit, offset, y_used, units)
    ids = [str(i) for i in range(units)]
    present = np.ones(units, bool)
    mean_risk = pd.Series(offset).groupby(unit).mean().to_numpy()
    w = design(
        PREDICTORS,
        ids,
        present,
        sizes.astype(float),
        mean_risk,
        pd.Series("unit", index=ids),
        pd.DataFrame(index=ids),
    ).w
    out = {}
    for model, cells in (
        ("one common target", plain),
        ("with predictors", plain.with_predictors(w)),
    ):
        p = 0 if cells.w is None else cells.w.shape[1]
        if p not in samplers:
            samplers[p] = Sampler(
                ShrinkageSpec(predictors=p),
                SamplerSection(chains=4, draws=1000, tune=1000, cores=2, seed=1),
            )
        draws, diagnostics = samplers[p].run(cells, seed=seed)
        ratio = unit_draws(cells, draws).ratio
        lo95, hi95 = np.quantile(ratio, [0.025, 0.975], axis=0)
        lo90, hi90 = np.quantile(ratio, [0.05, 0.95], axis=0)
        median = np.median(ratio, axis=0)
        small_worse = (sizes < SMALL) & (true_ratio > WORSE)
        out[model] = {
            "cov95": float(np.mean((lo95 <= true_ratio) & (true_ratio <= hi95))),
            "cov90": float(np.mean((lo90 <= true_ratio) & (true_ratio <= hi90))),
            "rmse": float(np.sqrt(np.mean(np.log(median / true_ratio) ** 2))),
            "small_worse": int(small_worse.sum()),
            "flagged": int((small_worse & (lo95 > 1)).sum()),
            "false_flags": int(((true_ratio <= 1) & (lo95 > 1)).sum()),
            "divergences": diagnostics.divergences,
            "rhat": diagnostics.rhat_max,
        }
    return out


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--networks", type=int, default=4, help="networks per kind")
    parser.add_argument("--units", type=int, default=200)
    args = parser.parse_args()
    samplers: dict = {}
    start = time.perf_counter()
    totals: dict[tuple[str, str], list[dict]] = {}
    for kind in ("severity", "volume"):
        for n in range(args.networks):
            for model, figures in one_network(kind, args.units, 100 + n, samplers).items():
                totals.setdefault((kind, model), []).append(figures)
                print(
                    f"{kind:8s} network {n + 1} {model:17s}: coverage 95% "
                    f"{figures['cov95'] * 100:5.1f}%, 90% {figures['cov90'] * 100:5.1f}%, "
                    f"RMSE {figures['rmse']:.4f}, small truly worse flagged "
                    f"{figures['flagged']}/{figures['small_worse']}, "
                    f"flagged worse but truly not {figures['false_flags']}, R-hat max "
                    f"{figures['rhat']:.3f}, divergences {figures['divergences']}"
                )
    ok = True
    for (kind, model), runs in totals.items():
        cov95 = np.mean([r["cov95"] for r in runs])
        cov90 = np.mean([r["cov90"] for r in runs])
        rmse = np.mean([r["rmse"] for r in runs])
        flagged, worse = sum(r["flagged"] for r in runs), sum(r["small_worse"] for r in runs)
        false = sum(r["false_flags"] for r in runs)
        print(
            f"{kind:8s} {model:17s} over {len(runs)} networks: coverage 95% "
            f"{cov95 * 100:.1f}%, 90% {cov90 * 100:.1f}%, RMSE {rmse:.4f}, "
            f"small truly worse flagged {flagged}/{worse}, flagged worse but truly not {false}"
        )
        if model == "with predictors":
            plain_rmse = np.mean([r["rmse"] for r in totals[(kind, "one common target")]])
            target = 0.93 <= cov95 <= 0.97 and 0.88 <= cov90 <= 0.92 and rmse <= plain_rmse * 1.001
            ok &= target
            print(
                f"{kind:8s} target (with predictors: 95% in 93-97, 90% in 88-92, RMSE no worse "
                "than one common target, "
                f"ratio {rmse / plain_rmse:.3f}): {'met' if target else 'NOT met'}"
            )
    print(
        f"summary: {args.networks} networks x 2 kinds x 2 models of {args.units} units in "
        f"{time.perf_counter() - start:.0f} s; "
        f"targets {'met' if ok else 'NOT met'}"
    )


if __name__ == "__main__":
    main()
