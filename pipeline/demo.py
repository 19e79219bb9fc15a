"""The demonstration cycle: an invented network's inputs and a cycle config for them."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from pipeline.invented import (
    CASEMIX,
    MEASURES,
    NETWORK,
    PRESSURE_MEASURE,
    STAY_MEASURE,
    invent_network,
)


@dataclass(frozen=True)
class DemoFiles:
    config: Path
    cohort: Path
    units: Path
    truth: Path


PULL_PATIENTS = 'pull_towards = ["log_cases", "case_mix"]\n'
PULL_UNIT_LEVEL = 'pull_towards = ["log_cases"]\n'  # unit totals carry no patient risks

CONFIG_TEMPLATE = """\
# Demonstration cycle of an invented network. Every name and number in it is made up.
[cycle]
title = "{network}: outcomes by unit (invented demonstration data)"
publisher = "{network} (an invented network)"
period = "Invented reporting year 2026"
output = "{output}"
renderer = "auto"
invented_data = true
# example.org is reserved for examples: this site is not published anywhere.
site_url = "https://example.org/invented-network/"

[inputs]
cohort = "cohort.csv"
units = "units.csv"
unit_column = "unit_id"
record_column = "stay_id"

[reporting]
interval = 0.95
minimum_cases = 11
# Counts of 1 to 10 patients with (or without) an outcome are shown as ranges.
hide_counts_below = 11
benchmark = "network"

[sampler]
chains = 4
draws = 1000
tune = 1000
seed = {seed}
"""


def write_demo(
    folder: Path, site: Path, seed: int = 7, n_units: int = 44, largest: int = 4000
) -> DemoFiles:
    """Write the invented network's inputs, its truth and a cycle config into ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    units, cohort, truth, summary = invent_network(seed=seed, n_units=n_units, largest=largest)
    files = DemoFiles(
        folder / "cycle.toml", folder / "cohort.csv", folder / "units.csv", folder / "truth.csv"
    )
    units.to_csv(files.units, index=False)
    cohort.to_csv(files.cohort, index=False)
    truth.to_csv(files.truth, index=False)
    summary.to_csv(folder / "pressure_by_unit.csv", index=False)
    text = CONFIG_TEMPLATE.format(network=NETWORK, output=site.resolve().as_posix(), seed=seed)
    for m in MEASURES:
        text += "\n[[measures]]\n" + "".join(f'{k} = "{v}"\n' for k, v in m.items())
        if m["key"] == "readmit30":  # social risk: also fitted without it, and the difference shown
            text += (
                f'type = "binary"\nbetter = "lower"\ncasemix = "{CASEMIX} + C(deprivation_fifth)"\n'
                'social_risk = ["deprivation_fifth"]\nmissing = "drop"\n'
            )
        else:
            text += f'type = "binary"\nbetter = "lower"\ncasemix = "{CASEMIX}"\n'
    text += "\n[[measures]]\n" + "".join(f'{k} = "{v}"\n' for k, v in STAY_MEASURE.items())
    text += (
        'type = "continuous"\nfamily = "gamma"\nunit_label = "days"\nbetter = '
        f'"lower"\ncasemix = "{CASEMIX} + deprivation_fifth"\nmissing = "impute"\n'
    )
    text += "\n[[measures]]\n" + "".join(f'{k} = "{v}"\n' for k, v in PRESSURE_MEASURE.items())
    text += 'type = "binary"\nbetter = "lower"\nsummary = "pressure_by_unit.csv"\n'
    # What small units are pulled towards: units of similar size and (with patient rows) similar
    # patients' risk; chosen on benchmarks/coverage_target.py and this network (DEVELOPERS.md).
    parts = text.split("\n[[measures]]\n")
    text = "\n[[measures]]\n".join(
        [
            parts[0],
            *(p + (PULL_UNIT_LEVEL if "summary = " in p else PULL_PATIENTS) for p in parts[1:]),
        ]
    )
    files.config.write_text(text, encoding="utf-8")
    return files
