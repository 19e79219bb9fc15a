"""One benchmark for every published number (pipeline/casemix/benchmark.py), checked as invariants.

Invented skewed networks: a few large units that differ from many small ones, in both directions,
for every likelihood (binomial cells, binomial curves, gamma, log-normal, unit-level Poisson). In
each, one large "anchor" unit has exactly as many events (or days) as its published expected
count. Whatever the skew, that unit must be in line with the benchmark with a ratio within 0.03 of
1, and every unit resting mostly on its own data (weight >= 0.9) must have a ratio within 0.03 of
its published O/E on the log scale. The invariants are the issue's; the networks are our own.
"""

from __future__ import annotations

import os
import textwrap

import numpy as np
import pandas as pd
import pytest
from scipy.special import expit, logit

from pipeline.cache import Cache, code_version
from pipeline.casemix.benchmark import benchmark_offset
from pipeline.casemix.model import fit_with_design
from pipeline.config import load_config
from pipeline.fitting import fit_measures
from pipeline.inputs.data import load_cohort
from pipeline.progress import SilentReporter
from pipeline.shrinkage.draws import unit_draws
from pipeline.shrinkage.model import Cells

pytestmark = pytest.mark.slow

CONFIG = """
[cycle]
title = "Skewed invented network"
publisher = "Invented publisher"
period = "Invented period"
output = "site"
renderer = "builtin"

[inputs]
cohort = "cohort.csv"
units = "units.csv"
record_column = "stay_id"

[reporting]
minimum_cases = 11

[sampler]
chains = 4
draws = 1000
tune = 1000

[validation]
folds = 2
"""
MEASURES = {  # key -> (outcome, type, casemix, family, skew direction of the large units)
    "cells_up": ("bin_up", "binary", "C(band)", "", +1),
    "curves_down": ("bin_down", "binary", "sev", "", -1),
    "gamma_up": ("los_up", "continuous", "sev", "gamma", +1),
    "lognormal_down": ("los_down", "continuous", "sev", "lognormal", -1),
}
SUMMARIES = {"summary_up": +1, "summary_down": -1}
ANCHOR = "u00"


def _units() -> pd.DataFrame:
    sizes = [3000] + [2500] * 4 + list(np.linspace(20, 70, 25).round().astype(int))
    return pd.DataFrame(
        {
            "id": [f"u{i:02d}" for i in range(len(sizes))],
            "name": [f"Invented unit {i}" for i in range(len(sizes))],
            "kind": ["hospital"] * 5 + ["clinic"] * 25,
            "size": sizes,
        }
    )


def _measure_toml(key: str, outcome: str, kind: str, casemix: str, family: str) -> str:
    extra = f'family = "{family}"\nunit_label = "days"\n' if family else ""
    return (
        f'\n[[measures]]\nkey = "{key}"\nname = "{key}"\ndefinition = "Invented."\noutcome '
        f'= "{outcome}"\ntype = "{kind}"\ncasemix = "{casemix}"\n{extra}'
    )


def _invent(
    rng: np.random.Generator, units: pd.DataFrame
) -> tuple[pd.DataFrame, dict[str, pd.DataFrame]]:
    unit = np.repeat(units["id"].to_numpy(), units["size"].to_numpy())
    large = np.isin(unit, units["id"][:5])
    # very different case mix across units
    mean_sev = dict(zip(units["id"], rng.normal(0, 1.0, len(units)), strict=True))
    sev = rng.normal([mean_sev[u] for u in unit], 1.0)
    rows = pd.DataFrame(
        {
            "stay_id": [f"s{i}" for i in range(len(unit))],
            "unit_id": unit,
            "sev": sev.round(3),
            "band": pd.cut(sev, [-np.inf, -1, 0, 1, np.inf], labels=["a", "b", "c", "d"]).astype(
                str
            ),
        }
    )
    for outcome, kind, _, family, sign in MEASURES.values():
        effect = np.where(large, 0.35 * sign, -0.35 * sign) + rng.normal(0, 0.1, len(unit))
        if kind == "binary":
            rows[outcome] = rng.binomial(1, expit(-1.8 + 0.6 * sev + effect))
        elif family == "gamma":
            rows[outcome] = rng.gamma(2.0, np.exp(1.2 + 0.3 * sev + effect) / 2.0).round(3) + 0.01
        else:
            rows[outcome] = (
                np.exp(1.0 + 0.3 * sev + effect + rng.normal(0, 0.6, len(unit))).round(3) + 0.01
            )
    unit_tables = {}
    for key, sign in SUMMARIES.items():
        cases = units["size"].to_numpy()
        # supplied from elsewhere, 10% too high overall
        expected = cases * 0.12 * np.exp(0.3 * rng.normal(0, 1, len(cases)))
        truth = (
            expected / 1.1 * np.exp(np.where(np.arange(len(cases)) < 5, 0.3 * sign, -0.3 * sign))
        )
        observed = rng.poisson(truth).astype(float)
        rest, total = observed[1:].sum(), expected.sum()
        # the anchor: O equals its scaled E
        observed[0] = round(expected[0] * rest / (total - expected[0]))
        unit_tables[key] = pd.DataFrame(
            {
                "unit_id": units["id"],
                "cases": cases,
                "events": observed,
                "expected": expected.round(4),
            }
        )
    return rows, unit_tables


def _balance_anchor(config, rows: pd.DataFrame, units: pd.DataFrame) -> None:
    """Change the anchor's outcomes until its observed total equals its published expected total (in
    place)."""
    anchor = (rows["unit_id"] == ANCHOR).to_numpy()
    codes = pd.Categorical(rows["unit_id"], categories=units["id"]).codes.astype(np.int64)
    rng = np.random.default_rng(5)
    for measure in config.measures:
        if measure.summary:
            continue
        for _ in range(6):
            fit, _, y = fit_with_design(measure, rows, codes)
            _, expected, _ = benchmark_offset(
                config.reporting.benchmark, measure, fit, y, codes[fit.used]
            )
            e, o = expected[anchor].sum(), y[anchor].sum()
            if measure.type == "binary":
                gap = int(round(e - o))
                if gap == 0:
                    break
                candidates = np.flatnonzero(
                    anchor & (rows[measure.outcome].to_numpy() == (0 if gap > 0 else 1))
                )
                flip = rng.choice(candidates, abs(gap), replace=False)
                rows.loc[flip, measure.outcome] = 1 if gap > 0 else 0
            else:
                if abs(o / e - 1) < 1e-4:
                    break
                rows.loc[anchor, measure.outcome] *= e / o


@pytest.fixture(scope="module")
def skewed(tmp_path_factory):
    folder = tmp_path_factory.mktemp("skewed")
    units = _units()
    rows, unit_tables = _invent(np.random.default_rng(20261202), units)
    text = CONFIG + "".join(_measure_toml(k, *v[:4]) for k, v in MEASURES.items())
    for key in SUMMARIES:
        unit_tables[key].to_csv(folder / f"{key}.csv", index=False)
        text += (
            f'\n[[measures]]\nkey = "{key}"\nname = "{key}"\ndefinition = '
            f'"Invented."\noutcome = "events"\nsummary = "{key}.csv"\ncasemix = "1"\n'
        )
    (folder / "cycle.toml").write_text(textwrap.dedent(text), encoding="utf-8")
    units.drop(columns="size").to_csv(folder / "units.csv", index=False)
    config = load_config(folder / "cycle.toml")
    _balance_anchor(config, rows, units)
    rows.to_csv(folder / "cohort.csv", index=False)
    cohort = load_cohort(config)
    return fit_measures(config, cohort, Cache(None), SilentReporter())


def test_the_skewed_networks_use_every_likelihood(skewed):
    kinds = {r.measure.key: (r.casemix.family, len(r.table)) for r in skewed}
    assert set(kinds) == set(MEASURES) | set(SUMMARIES)
    # the typical unit really differs from the benchmark in these networks (else the test proves
    # little)
    assert all(abs(np.log(r.typical / r.benchmark)) > 0.05 for r in skewed), {
        r.measure.key: r.typical / r.benchmark for r in skewed
    }


def test_a_unit_with_as_many_events_as_expected_is_in_line_with_the_benchmark(skewed):
    for r in skewed:
        row = r.table.set_index("unit_id").loc[ANCHOR]
        assert abs(row["observed"] / row["expected"] - 1) < 0.004, (
            r.measure.key,
            row["observed"],
            row["expected"],
        )
        assert row["own_weight"] > 0.9, r.measure.key
        assert abs(row["ratio_median"] - 1) <= 0.03, (r.measure.key, row["ratio_median"])
        assert row["group"] == "typical" and row["position"] == "spans", (
            r.measure.key,
            row["group"],
        )
        assert 0.2 < row["prob_above_benchmark"] < 0.8, (r.measure.key, row["prob_above_benchmark"])


def test_units_on_their_own_data_have_a_ratio_close_to_their_published_oe(skewed):
    for r in skewed:
        t = r.table[(r.table["status"] == "reported") & (r.table["own_weight"] >= 0.9)]
        if r.casemix.family == "lognormal":
            # A log-normal fit estimates a unit's mean from its log-scale mean, a different (more
            # efficient)
            # estimator than the arithmetic O/E: with 50 patients and sigma 0.6 the two differ by
            # sampling
            # noise of about 0.08 on the log scale whatever the benchmark. Only large units must
            # agree.
            t = t[t["cases"] >= 1000]
        assert len(t) >= 5, r.measure.key
        gap = np.abs(np.log(t["ratio_median"]) - np.log(t["oe_ratio"]))
        print(
            f"{r.measure.key}: {len(t)} units with weight >= 0.9, largest |log ratio - log "
            f"O/E| {gap.max():.4f}"
        )
        assert gap.max() <= 0.03, (
            r.measure.key,
            t.assign(gap=gap)[["unit_id", "oe_ratio", "ratio_median", "gap"]],
        )


def test_every_number_of_a_row_uses_the_same_benchmark(skewed):
    for r in skewed:
        t = r.table[r.table["status"] == "reported"]
        assert np.allclose(t["rsr_median"], t["ratio_median"] * r.benchmark, rtol=1e-9)
        assert np.allclose(t["rsr_lower"], t["ratio_lower"] * r.benchmark, rtol=1e-9)
        # expected counts add up to the benchmark's total over the whole network
        # (calibration-in-the-large)
        total = r.table["expected"].sum()
        assert total == pytest.approx(r.benchmark * r.casemix.patients, rel=1e-6)
        # a unit with its whole interval above the benchmark is above it in probability too, and
        # vice versa
        above = t["rsr_lower"] > r.benchmark
        assert (t.loc[above, "prob_above_benchmark"] > 0.95).all() and (
            t.loc[t["rsr_upper"] < r.benchmark, "prob_below_benchmark"] > 0.95
        ).all()


def test_with_no_risk_factors_the_adjusted_rate_is_the_units_own_posterior_rate():
    # casemix = "1": every offset is the benchmark's intercept logit(R); the adjusted rate must be
    # expit(logit(R) + mu + u_i) itself, with no rescaling factor (an identity, checked draw by
    # draw).
    rate = 0.13
    cells = Cells(
        unit=np.array([0, 1]),
        offset=np.full(2, logit(rate)),
        n=np.array([40.0, 900.0]),
        r=np.array([3.0, 120.0]),
        n_units=2,
    )
    mu, u = np.array([-0.3, 0.1, 0.4]), np.array([[0.2, -0.1], [0.0, 0.5], [-0.6, 0.3]])
    draws = unit_draws(cells, {"mu": mu, "u": u, "tau": np.ones(3)})
    assert np.allclose(draws.ratio * rate, expit(logit(rate) + mu[:, None] + u), rtol=1e-12)


def test_a_changed_fitting_constant_changes_the_fit_key(monkeypatch):
    from pipeline.shrinkage import model as shrinkage

    before = code_version()
    monkeypatch.setattr(shrinkage, "CENTRE_BELOW", shrinkage.CENTRE_BELOW * 2)
    assert code_version() != before


_CONSTANTS = """
import hashlib, importlib, json
from pipeline.cache import FITTING_MODULES, _has_value
found = {}
for name in FITTING_MODULES:
    module = importlib.import_module("pipeline." + name)
    for k, v in vars(module).items():
        if k.isupper() and not callable(v) and _has_value(v):
            text = json.dumps(v, sort_keys=True, default=repr)
            found[name + "." + k] = hashlib.sha256(text.encode()).hexdigest()
print(json.dumps(found))
"""


def test_the_fit_key_is_the_same_in_every_process():
    """A cached fit is reused by the next cycle, which runs in a new process: the key may hold no
    memory address (a module-level reporter once made every key new, so nothing was reused), no
    order that changes with Python's string hashing, and no constant that running a cycle
    changes."""
    import json
    import subprocess
    import sys

    def constants(seed: str) -> dict:
        env = {**os.environ, "PYTHONHASHSEED": seed}
        out = subprocess.run(
            [sys.executable, "-c", _CONSTANTS], env=env, capture_output=True, text=True, check=True
        )
        return json.loads(out.stdout)

    here: dict = {}
    exec(_CONSTANTS.replace("print(json.dumps(found))", "here.update(found)"), {"here": here})
    first, second = constants("1"), constants("2")
    assert first == second, [k for k in first if first[k] != second.get(k)]
    # this process has run other tests' cycles by now
    assert here == first, [k for k in first if first[k] != here.get(k)]
