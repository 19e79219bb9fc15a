"""Case-mix fit plus 5-fold cross-validation at 1,000,000 patients x 15 risk factors, 200 units.

Targets: under 60 s wall time and under 4 GiB peak memory (this process's maximum resident
set size, which includes making the invented data).

Peer, measured in the same run on the same design: scikit-learn's LogisticRegression (lbfgs,
no penalty) with one-hot unit columns, a single fit (no validation). The coefficients of the
two fits are compared too.

    python benchmarks/casemix_scale.py [--patients N] [--skip-peer]
"""

from __future__ import annotations

import argparse
import resource
import time

import numpy as np
import pandas as pd
from scipy.special import expit

from pipeline.casemix.model import fit_with_design
from pipeline.casemix.validation import validate
from pipeline.config import MeasureSection

TARGET_SECONDS, TARGET_GIB = 60.0, 4.0


def invent(patients: int, units: int, seed: int = 1) -> tuple[pd.DataFrame, np.ndarray]:
    """Invented patients: 5 numeric and 10 binary risk factors; sicker units are also worse."""
    rng = np.random.default_rng(seed)
    unit = np.sort(rng.integers(0, units, patients))
    severity = rng.normal(0, 0.5, units)
    numeric = rng.normal(severity[unit][:, None], 1.0, (patients, 5))
    binary = rng.random((patients, 10)) < expit(-1.5 + severity[unit][:, None])
    b_num, b_bin = np.linspace(0.5, 0.1, 5), np.linspace(0.6, 0.05, 10)
    eta = (
        -2.2
        + numeric @ b_num
        + binary @ b_bin
        + 0.3 * severity[unit]
        + rng.normal(0, 0.2, units)[unit]
    )
    rows = pd.DataFrame(numeric, columns=[f"x{i}" for i in range(5)])
    for j in range(10):
        rows[f"c{j}"] = binary[:, j].astype(np.int8)
    rows["y"] = (rng.random(patients) < expit(eta)).astype(np.int8)
    return rows, unit.astype(np.int64)


def peak_gib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20  # kilobytes on Linux


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--patients", type=int, default=1_000_000)
    parser.add_argument("--units", type=int, default=200)
    parser.add_argument("--skip-peer", action="store_true")
    args = parser.parse_args()
    rows, unit = invent(args.patients, args.units)
    formula = " + ".join([f"x{i}" for i in range(5)] + [f"c{j}" for j in range(10)])
    measure = MeasureSection(
        key="bench", name="Bench", definition="d", outcome="y", casemix=formula
    )
    print(
        f"{args.patients:,} patients, {args.units} units, 15 risk factors, "
        f"{int(rows['y'].sum()):,} events; memory after making data {peak_gib():.2f} GiB"
    )

    start = time.perf_counter()
    fit, x, y = fit_with_design(measure, rows, unit)
    fitted = time.perf_counter()
    v = validate(
        fit, True, y, x, unit[fit.used], folds=5, groups=10, threshold=float(y.mean()), seed=1
    )
    done = time.perf_counter()
    total = done - start
    print(
        f"case-mix fit ({fit.solver}): {fitted - start:.1f} s; 5-fold validation: "
        f"{done - fitted:.1f} s; "
        f"total {total:.1f} s; target {TARGET_SECONDS:.0f} s; ratio to target "
        f"{total / TARGET_SECONDS:.2f}"
    )
    print(
        f"peak memory {peak_gib():.2f} GiB; target {TARGET_GIB:.0f} GiB; ratio to target "
        f"{peak_gib() / TARGET_GIB:.2f}"
    )
    print(
        f"C-statistic in sample {v.in_sample.values['c_statistic']:.4f}, cross-validated "
        f"{v.cross_validated.values['c_statistic']:.4f}; "
        f"calibration slope cross-validated {v.cross_validated.values['calibration_slope']:.3f}"
    )
    if args.skip_peer:
        return
    from scipy import sparse
    from sklearn.linear_model import LogisticRegression

    start = time.perf_counter()
    dummies = sparse.csr_matrix((np.ones(len(unit)), (np.arange(len(unit)), unit)))[:, 1:]
    design = sparse.hstack([sparse.csr_matrix(x), dummies]).tocsr()
    peer = LogisticRegression(C=np.inf, solver="lbfgs", max_iter=2000, tol=1e-8).fit(design, y)
    peer_seconds = time.perf_counter() - start
    gap = np.max(np.abs(peer.coef_[0, : x.shape[1]] - fit.coefficients["estimate"].to_numpy()))
    print(
        "peer: scikit-learn LogisticRegression (lbfgs, unit one-hot columns), one fit: "
        f"{peer_seconds:.1f} s; "
        f"fairgauge fit + 5-fold validation / peer single fit = {total / peer_seconds:.2f}; "
        f"largest coefficient difference {gap:.2e}"
    )


if __name__ == "__main__":
    main()
