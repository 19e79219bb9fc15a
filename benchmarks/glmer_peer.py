"""The whole binary fit at 1,000,000 patients, 200 units, 10 risk factors, against R's lme4.

fairgauge: within-unit case-mix fit, then the hierarchical shrinkage fit (4 chains x 1,000
draws, nutpie, model compilation included), then per-unit ratios. Peer, in the same run on the
same data: ``lme4::glmer(y ~ x1 + ... + x10 + (1 | unit), family = binomial, nAGQ = 0)``, a point
fit (conditional modes, no intervals), timed inside R after the data are loaded. Both are
compared with the invented truth: RMSE of the unit effects (log-odds, centred) and, for
fairgauge, the coverage of its 95% intervals.

Sicker units are also worse in the invented network (unit quality tracks severity), the case
where a fit that shares coefficients across units can be biased.

    python benchmarks/glmer_peer.py [--patients N] [--units K] [--no-peer]

Installs nothing itself except, when R or lme4 is missing, `apt-get install r-base-core
r-cran-lme4`.
"""

from __future__ import annotations

import argparse
import json
import resource
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.special import expit

from pipeline.casemix.model import fit_with_design
from pipeline.config import MeasureSection, SamplerSection
from pipeline.external import find_tool, run_tool
from pipeline.shrinkage.draws import unit_draws
from pipeline.shrinkage.model import Cells, ShrinkageSpec
from pipeline.shrinkage.sampling import Sampler

R_SCRIPT = r"""
args <- commandArgs(trailingOnly = TRUE)
folder <- args[1]; n <- as.integer(args[2]); k <- as.integer(args[3])
x <- matrix(readBin(file.path(folder, "x.bin"), "double", n * k), ncol = k)
d <- data.frame(x)
names(d) <- paste0("x", seq_len(k))
d$y <- readBin(file.path(folder, "y.bin"), "double", n)
d$unit <- factor(readBin(file.path(folder, "unit.bin"), "integer", n))
suppressMessages(library(lme4))
f <- as.formula(paste("y ~", paste(names(d)[1:k], collapse = " + "), "+ (1 | unit)"))
seconds <- system.time(m <- glmer(f, data = d, family = binomial, nAGQ = 0))[["elapsed"]]
re <- ranef(m)$unit
write.csv(data.frame(unit = rownames(re), mode = re[, 1]), file.path(folder, "modes.csv"),
          row.names = FALSE)
writeLines(c(sprintf("%.3f", seconds), sprintf("%.10g", fixef(m))), file.path(folder, "glmer.txt"))
"""


def invent(patients: int, units: int, seed: int = 3):
    """Invented patients: 6 numeric and 4 binary risk factors; unit quality = 0.3 x severity +
    noise."""
    rng = np.random.default_rng(seed)
    sizes = np.round(np.exp(rng.uniform(np.log(200), np.log(12_000), units)))
    sizes = np.maximum(np.round(sizes / sizes.sum() * patients), 20).astype(int)
    unit = np.repeat(np.arange(units), sizes)
    severity = rng.normal(0, 0.5, units)
    x = np.column_stack(
        [rng.normal(severity[unit], 1.0, len(unit)) for _ in range(6)]
        + [(rng.random(len(unit)) < expit(-1.0 + severity[unit])).astype(float) for _ in range(4)]
    )
    b = np.array([0.5, 0.4, 0.3, 0.2, 0.1, 0.05, 0.6, 0.4, 0.3, 0.2])
    effect = 0.3 * severity + rng.normal(0, 0.25, units)
    effect -= effect.mean()
    y = (rng.random(len(unit)) < expit(-2.0 + x @ b + effect[unit])).astype(float)
    return x, y, unit, effect


def ensure_r() -> str:
    rscript = find_tool("Rscript")
    probe = "suppressMessages(library(lme4)); cat(as.character(packageVersion('lme4')))"
    if rscript is None or "lme4" in _try([rscript, "-e", probe]):
        run_tool(["apt-get", "install", "-y", "-qq", "r-base-core", "r-cran-lme4"], timeout=1800)
        rscript = find_tool("Rscript")
    return rscript


def _try(command: list[str]) -> str:
    try:
        run_tool(command)
        return ""
    except Exception as exc:  # noqa: BLE001 - any failure means "install it"
        return f"lme4 missing: {exc}"


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--patients", type=int, default=1_000_000)
    parser.add_argument("--units", type=int, default=200)
    parser.add_argument("--no-peer", action="store_true")
    parser.add_argument("--json", type=Path, help="also write the figures here")
    args = parser.parse_args()
    x, y, unit, effect = invent(args.patients, args.units)
    k = x.shape[1]
    rows = pd.DataFrame(x, columns=[f"x{i + 1}" for i in range(k)]).assign(y=y)
    print(f"{len(y):,} patients, {args.units} units, {k} risk factors, {int(y.sum()):,} events")

    start = time.perf_counter()
    measure = MeasureSection(
        key="bench", name="Bench", definition="d", outcome="y", casemix=" + ".join(rows.columns[:k])
    )
    fit, _, _ = fit_with_design(measure, rows, unit)
    casemix_done = time.perf_counter()
    cells = Cells.from_patients(unit, fit.intercept + fit.linear, y, args.units)
    sampler = Sampler(
        ShrinkageSpec(), SamplerSection(chains=4, draws=1000, tune=1000, cores=2, seed=1)
    )
    draws, diagnostics = sampler.run(cells, seed=1)
    ours = unit_draws(cells, draws)
    seconds = time.perf_counter() - start
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20
    u = ours.effect
    centred = u - u.mean(axis=1, keepdims=True)
    lo, hi = np.quantile(centred, [0.025, 0.975], axis=0)
    median = np.median(centred, axis=0)
    rmse = float(np.sqrt(np.mean((median - effect) ** 2)))
    coverage = float(np.mean((lo <= effect) & (effect <= hi)))
    print(
        f"fairgauge whole fit: {seconds:.1f} s (case-mix {casemix_done - start:.1f} s, "
        "shrinkage incl. compilation "
        f"{diagnostics.seconds:.1f} s); R-hat max {diagnostics.rhat_max:.3f}, bulk ESS min "
        f"{diagnostics.ess_bulk_min:.0f}, "
        f"divergences {diagnostics.divergences}; peak memory {peak:.2f} GiB (target 4 GiB)"
    )
    print(
        f"fairgauge unit effects: RMSE {rmse:.4f} (log-odds); 95% interval coverage "
        f"{coverage * 100:.1f}%; "
        f"risk coefficient x1 {fit.coefficients['estimate'].iloc[0]:.4f} (true 0.5)"
    )
    # The series against the exact per-patient likelihood on a 100,000-patient subset (curves.py).
    from pipeline.shrinkage.curves import build_curves, max_error

    subset = np.sort(np.random.default_rng(0).choice(len(y), 100_000, replace=False))
    ones, offset = np.ones(len(subset)), (fit.intercept + fit.linear)[subset]
    sub_curves = build_curves(unit[subset], offset, ones, y[subset], args.units)
    error = max_error(unit[subset], offset, ones, y[subset], args.units, sub_curves, points=50)
    print(
        "unit likelihood series vs exact per-patient log-likelihood, 100,000-patient subset: "
        f"largest error {error:.2e} "
        f"(50 random points in every unit's window)"
    )
    result = {
        "patients": len(y),
        "units": args.units,
        "series_error_100k": error,
        "fairgauge_seconds": seconds,
        "fairgauge_rmse": rmse,
        "fairgauge_coverage": coverage,
        "peak_gib": peak,
        "rhat_max": diagnostics.rhat_max,
    }
    if not args.no_peer:
        rscript = ensure_r()
        folder = Path(tempfile.mkdtemp(prefix="fairgauge-glmer-"))
        try:
            x.T.astype("<f8").tofile(folder / "x.bin")  # column-major for R's matrix()
            y.astype("<f8").tofile(folder / "y.bin")
            unit.astype("<i4").tofile(folder / "unit.bin")
            (folder / "fit.R").write_text(R_SCRIPT)
            wall = time.perf_counter()
            run_tool(
                [rscript, str(folder / "fit.R"), str(folder), str(len(y)), str(k)], timeout=3600
            )
            wall = time.perf_counter() - wall
            lines = (folder / "glmer.txt").read_text().split()
            peer_seconds, fixef = float(lines[0]), np.array([float(v) for v in lines[1:]])
            modes = pd.read_csv(folder / "modes.csv")
            mode = np.zeros(args.units)
            mode[modes["unit"].to_numpy(int)] = modes["mode"].to_numpy()
            peer_rmse = float(np.sqrt(np.mean((mode - mode.mean() - effect) ** 2)))
        finally:
            shutil.rmtree(folder, ignore_errors=True)
        print(
            f"peer: lme4 glmer(nAGQ = 0) fit {peer_seconds:.1f} s (R process in all, with "
            f"loading the data: {wall:.1f} s); "
            f"unit effects RMSE {peer_rmse:.4f}; risk coefficient x1 {fixef[1]:.4f}"
        )
        print(
            f"ratio fairgauge whole fit / glmer fit = {seconds / peer_seconds:.2f}; "
            f"RMSE ratio fairgauge / glmer = {rmse / peer_rmse:.2f}"
        )
        result.update(glmer_seconds=peer_seconds, glmer_rmse=peer_rmse)
    if args.json:
        args.json.write_text(json.dumps(result, indent=2))


if __name__ == "__main__":
    main()
