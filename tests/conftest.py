"""Shared fixtures: tiny seeded inputs, and one real demo cycle per test session."""

from __future__ import annotations

import textwrap
from pathlib import Path

import pandas as pd
import pytest

from pipeline.config import load_config
from pipeline.cycle import run_cycle
from pipeline.demo import write_demo

BASE_CONFIG = """
[cycle]
title = "Test network"
publisher = "Test publisher"
period = "Test period"
output = "site"
renderer = "builtin"

[inputs]
cohort = "cohort.csv"
units = "units.csv"
record_column = "stay_id"

[sampler]
chains = 2
draws = 300
tune = 300
cores = 1

[[measures]]
key = "readmit"
name = "Readmission"
definition = "Readmitted within 30 days."
outcome = "readmit"
casemix = "age + C(sex)"
"""


def small_cohort() -> tuple[pd.DataFrame, pd.DataFrame]:
    """Six rows over two units: the smallest valid input."""
    units = pd.DataFrame(
        {"id": ["a1", "b2"], "name": ["Unit A", "Unit B"], "kind": ["hospital", "clinic"]}
    )
    cohort = pd.DataFrame(
        {
            "stay_id": [f"s{i}" for i in range(6)],
            "unit_id": ["a1", "a1", "a1", "b2", "b2", "b2"],
            "age": [50, 61, 72, 45, 80, 66],
            "sex": ["F", "M", "F", "M", "F", "M"],
            "readmit": [0, 1, 0, 0, 1, 1],
        }
    )
    return units, cohort


@pytest.fixture
def cycle_folder(tmp_path: Path):
    """Write a valid small config plus inputs; return a function that writes variants."""

    def write(
        config: str = BASE_CONFIG,
        units: pd.DataFrame | None = None,
        cohort: pd.DataFrame | None = None,
    ) -> Path:
        u, c = small_cohort()
        (units if units is not None else u).to_csv(tmp_path / "units.csv", index=False)
        (cohort if cohort is not None else c).to_csv(tmp_path / "cohort.csv", index=False)
        (tmp_path / "cycle.toml").write_text(textwrap.dedent(config), encoding="utf-8")
        return tmp_path / "cycle.toml"

    return write


@pytest.fixture(scope="session")
def demo_cycle(tmp_path_factory):
    """The real demo cycle, run once: (demo files, summary, site folder)."""
    folder = tmp_path_factory.mktemp("demo")
    files = write_demo(folder / "inputs", folder / "site")
    summary = run_cycle(load_config(files.config), renderer="builtin")
    return files, summary, folder / "site"


HOSTILE_NAMES = {
    0: "<script>alert('x')</script> *Bold* [link](http://evil.example) | pipe",
    1: "St. Mary's # 1 & <b>Co</b>",
}
HOSTILE_CONFIG = """
[cycle]
title = "Hostile test network"
publisher = "Test publisher"
period = "Test period"
output = "site"
renderer = "builtin"

[inputs]
cohort = "cohort.csv"
units = "units.csv"
record_column = "stay_id"

[sampler]
chains = 4
draws = 1000
tune = 1000
target_accept = 0.95
seed = 99

[[measures]]
key = "readmit30"
name = "Readmission"
definition = "Readmitted within 30 days."
outcome = "readmit30"
casemix = "C(age_band) + emergency + frailty"

[[measures]]
key = "death30"
name = "Death"
definition = "Died within 30 days."
outcome = "death30"
expected_column = "vendor_risk"
"""


@pytest.fixture(scope="session")
def hostile_cycle(tmp_path_factory):
    """A small real cycle whose inputs carry planted identifiers, unique markers and hostile names.

    Returns (folder, markers by column, summary, site). Markers are unique per row in every
    column that can hold one: the record id, three identifier-like columns and a numeric risk
    factor (unit ids, outcomes and category labels are published or aggregated by design).
    """
    import numpy as np

    from pipeline.invented import invent_network

    folder = tmp_path_factory.mktemp("hostile")
    units, cohort, *_ = invent_network(seed=3, n_units=16, smallest=10, largest=500)
    for i, name in HOSTILE_NAMES.items():
        units.loc[i, "name"] = name
    n = len(cohort)
    rng = np.random.default_rng(0)
    cohort["stay_id"] = [f"ZQXREC{i:07d}" for i in range(n)]
    cohort["patient_name"] = [f"ZQXNAME{i:07d}" for i in range(n)]
    cohort["date_of_birth"] = [f"ZQXDOB{i:07d}" for i in range(n)]
    cohort["phone"] = [f"ZQXTEL{i:07d}" for i in range(n)]
    cohort["frailty"] = np.round(rng.normal(0, 1, n), 9) + np.arange(n) * 1e-9
    markers = {c: list(cohort[c]) for c in ("stay_id", "patient_name", "date_of_birth", "phone")}
    markers["frailty"] = [f"{v:.9f}" for v in cohort["frailty"]]
    # A risk supplied by an (invented) model fitted elsewhere, used as the expected value itself.
    cohort["vendor_risk"] = np.round(
        1 / (1 + np.exp(5.0 - 1.0 * cohort["emergency"] - 0.5 * (cohort["age_band"] == "85+"))), 4
    )
    units.to_csv(folder / "units.csv", index=False)
    cohort.to_csv(folder / "cohort.csv", index=False, float_format="%.9f")
    (folder / "cycle.toml").write_text(HOSTILE_CONFIG)
    summary = run_cycle(load_config(folder / "cycle.toml"))
    return folder, markers, summary, folder / "site"


DEMO_RISK = [
    "age_band",
    "sex",
    "emergency",
    "heart_failure",
    "copd",
    "diabetes",
    "renal_disease",
    "cancer",
]


def demo_counts(inputs: Path) -> pd.DataFrame:
    """The demo's true cases and counts per measure and unit, from its invented inputs (not from the
    pipeline).

    Patient rows count where the outcome and every risk factor the measure drops on are recorded
    (readmit30 drops rows without deprivation_fifth; stay imputes it); pressure comes as unit
    totals. For stay, ``observed`` is the total of days.
    """
    cohort = pd.read_csv(inputs / "cohort.csv")
    parts = []
    for measure, outcome, needed in [
        ("readmit30", "readmit30", [*DEMO_RISK, "deprivation_fifth"]),
        ("death30", "death30", DEMO_RISK),
        ("complication", "complication", DEMO_RISK),
        ("stay", "los_days", DEMO_RISK),
    ]:
        rows = cohort.dropna(subset=[outcome, *needed]).groupby("unit_id")[outcome]
        parts.append(
            pd.DataFrame(
                {
                    "measure": measure,
                    "unit_id": rows.size().index.astype(str),
                    "cases": rows.size().to_numpy(),
                    "observed": rows.sum().to_numpy(),
                }
            )
        )
    pressure = pd.read_csv(inputs / "pressure_by_unit.csv", dtype={"unit_id": str})
    parts.append(
        pressure.rename(columns={"pressure_injury": "observed"})[
            ["unit_id", "cases", "observed"]
        ].assign(measure="pressure")
    )
    return pd.concat(parts, ignore_index=True)


# Fixtures that run a whole cycle: a test that uses one is slow, whatever its own marks say.
WHOLE_CYCLE_FIXTURES = {"demo_cycle", "demo_counts"}


def pytest_collection_modifyitems(config, items):
    for item in items:
        if WHOLE_CYCLE_FIXTURES & set(getattr(item, "fixturenames", ())):
            item.add_marker(pytest.mark.slow)


@pytest.fixture
def fake_sampler(monkeypatch):
    """Every shrinkage fit in the test draws from the fake sampler (tests/fake_sampler.py)."""
    from .fake_sampler import fake_run

    monkeypatch.setattr("pipeline.shrinkage.sampling.Sampler.run", fake_run)
    return fake_run
