"""An invented health network for demonstrations and tests.

Everything here is made up: the network, its unit names, patients and outcomes. The true
unit effects are kept (``truth.csv``) so tests can check that the shrinkage fit recovers them:
``true_predicted`` is each unit's expected total given its true quality, so its true ratio to the
benchmark is ``true_predicted`` over the published expected total (benchmark.py);
``true_ratio`` is the same against the generator's own intercept.
Sicker-than-average units are drawn to be somewhat worse on outcomes too, because real
networks are like that and the case-mix fit must not be fooled by it.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy.special import expit

NETWORK = "Marlowe Vale Health Network"

# Invented name parts; combinations are checked only for being unique within a network.
_PLACES = [
    "Quillby Moor",
    "Hessingford",
    "Larkspur Rise",
    "Old Tannery",
    "Brindlecombe",
    "Wyvern Cross",
    "Saltmarsh Lane",
    "Corran Vale",
    "Fennick Hill",
    "Mossgate",
    "Ashby Wenlow",
    "Tolver Bridge",
    "Pennymead",
    "Ravelston Quay",
    "Gorsedown",
    "Kittering",
    "Ormsley Fields",
    "Hollin Bank",
    "Marlowe Central",
    "Stavely Down",
    "Cobbett's Green",
    "Nettlecombe",
    "Wrayfield",
    "Birchlode",
    "Dunnock Park",
    "Eastmere",
    "Frith Common",
    "Grantley Ings",
    "Halsworth",
    "Ingleby Rowe",
    "Juniper Street",
    "Keld Valley",
    "Lowther Yard",
    "Merrow End",
    "Northcote Hythe",
    "Oakhurst Mill",
    "Pellow Sands",
    "Quarry Lane",
    "Rookwood",
    "Sallow Point",
    "Thornby Edge",
    "Underfell",
    "Vantage Road",
    "Westerleigh",
    "Yarrow Heath",
    "Zennor Gate",
    "Almsbury",
    "Bellhaven",
    "Calder Mouth",
    "Drovers Way",
    "Elderfold",
    "Foxlydiate",
    "Glebe Ridge",
    "Hazelrigg",
    "Ivybridge Row",
    "Jessop Fold",
    "Kelsey Wharf",
    "Linthorpe",
    "Millbeck",
    "Netherby Cross",
]
_KINDS = [  # (kind, name suffix), chosen by unit size: largest first
    ("general hospital", "General Hospital"),
    ("community hospital", "Community Hospital"),
    ("surgical centre", "Surgical Centre"),
    ("specialist clinic", "Clinic"),
]
AGE_BANDS = ["18-44", "45-64", "65-74", "75-84", "85+"]
CONDITIONS = ["heart_failure", "copd", "diabetes", "renal_disease", "cancer"]
CASEMIX = (
    "C(age_band) + C(sex) + emergency + heart_failure + copd + diabetes + renal_disease + cancer"
)

# True coefficients per measure (log-odds), in the same coding the case-mix formula uses:
# reference patient = age 18-44, female, planned admission, none of the conditions.
_TRUTH: dict[str, dict[str, Any]] = {
    "readmit30": dict(
        intercept=-2.75,
        age=[0.0, 0.15, 0.3, 0.45, 0.55],
        male=0.08,
        emergency=0.35,
        heart_failure=0.55,
        copd=0.4,
        diabetes=0.2,
        renal_disease=0.45,
        cancer=0.35,
        tau=0.25,
    ),
    "death30": dict(
        intercept=-5.9,
        age=[0.0, 0.7, 1.25, 1.8, 2.4],
        male=0.15,
        emergency=0.9,
        heart_failure=0.6,
        copd=0.35,
        diabetes=0.1,
        renal_disease=0.5,
        cancer=0.95,
        tau=0.3,
    ),
    "complication": dict(  # the rare measure: about 1 in 100
        intercept=-5.4,
        age=[0.0, 0.2, 0.35, 0.5, 0.6],
        male=0.2,
        emergency=0.6,
        heart_failure=0.3,
        copd=0.3,
        diabetes=0.35,
        renal_disease=0.4,
        cancer=0.3,
        tau=0.35,
    ),
}
# Length of stay (days): Gamma with log link, shape 1.8; log-scale coefficients in the same coding.
_STAY: dict[str, Any] = dict(
    intercept=1.25,
    age=[0.0, 0.1, 0.2, 0.3, 0.35],
    male=0.0,
    emergency=0.3,
    heart_failure=0.25,
    copd=0.2,
    diabetes=0.08,
    renal_disease=0.2,
    cancer=0.3,
    deprivation=0.03,
    tau=0.12,
    shape=1.8,
)
# Hospital-acquired pressure injury, reported per unit with expected events from an invented
# external model.
_PRESSURE: dict[str, Any] = dict(intercept=-4.6, age=[0.0, 0.3, 0.6, 0.9, 1.2], tau=0.3)
MISSING_DEPRIVATION = 0.004  # share of stays whose deprivation fifth was not recorded

MEASURES = [
    dict(
        key="readmit30",
        name="Readmission within 30 days",
        outcome="readmit30",
        definition="Adults discharged alive who were admitted again, unplanned, to any unit of "
        "the network within 30 days of going home.",
    ),
    dict(
        key="death30",
        name="Death within 30 days",
        outcome="death30",
        definition="Adults who died from any cause within 30 days of being admitted, in or out "
        "of hospital.",
    ),
    dict(
        key="complication",
        name="Serious complication after surgery",
        outcome="complication",
        definition="Adults who had a serious complication (such as a return to theatre, a "
        "blood clot in the lung or a deep wound infection) within 30 days of an "
        "operation.",
    ),
]
STAY_MEASURE = dict(
    key="stay",
    name="Length of stay",
    outcome="los_days",
    definition="Days from admission to discharge for adults discharged alive (part days count "
    "as fractions).",
)
PRESSURE_MEASURE = dict(
    key="pressure",
    name="Pressure injury acquired in hospital",
    outcome="pressure_injury",
    definition="Adults who developed a new pressure injury during their stay, counted by each "
    "unit and sent with the expected number from the network's own risk tool.",
)


@dataclass(frozen=True)
class DemoFiles:
    config: Path
    cohort: Path
    units: Path
    truth: Path


def invent_network(seed: int = 7, n_units: int = 44, smallest: int = 10, largest: int = 4000):
    """Make the unit table, the cohort and the true effects of an invented network."""
    rng = np.random.default_rng(seed)
    sizes = np.sort(
        np.round(np.exp(rng.uniform(np.log(smallest), np.log(largest), n_units))).astype(int)
    )[::-1]
    sizes[0], sizes[-1] = largest, smallest  # always span the full range
    names: np.ndarray | list[str]
    if n_units <= len(_PLACES):
        names = rng.choice(_PLACES, size=n_units, replace=False)
    else:  # bigger invented networks (benchmarks): numbered places, still unique
        names = [
            _PLACES[i % len(_PLACES)] + ("" if i < len(_PLACES) else f" {i // len(_PLACES) + 1}")
            for i in rng.permutation(n_units)
        ]
    kind_of = np.minimum((np.arange(n_units) * len(_KINDS)) // n_units, len(_KINDS) - 1)
    unit_ids = [f"mv{i + 1:02d}" for i in range(n_units)]
    units = pd.DataFrame(
        {
            "id": unit_ids,
            "name": [f"{n} {_KINDS[k][1]}" for n, k in zip(names, kind_of, strict=True)],
            "kind": [_KINDS[k][0] for k in kind_of],
        }
    )
    severity = rng.normal(0.0, 0.5, n_units)  # how sick each unit's patients are
    unit_of = np.repeat(np.arange(n_units), sizes)
    s = severity[unit_of]
    n = len(unit_of)
    age_score = rng.normal(s, 1.0)
    age_band = np.digitize(age_score, [-0.9, -0.1, 0.5, 1.2])
    p_condition = expit(-1.9 + 0.35 * age_band[:, None] + s[:, None] * 0.5)
    conditions = rng.random((n, len(CONDITIONS))) < p_condition * np.array(
        [0.9, 0.8, 1.2, 0.7, 0.8]
    )
    cohort = pd.DataFrame(
        {
            "stay_id": [f"ST{i:07d}" for i in range(1, n + 1)],
            "unit_id": np.array(unit_ids)[unit_of],
            "age_band": np.array(AGE_BANDS)[age_band],
            "sex": np.where(rng.random(n) < 0.48, "M", "F"),
            "emergency": (rng.random(n) < expit(0.3 + 0.4 * s)).astype(int),
            **{c: conditions[:, j].astype(int) for j, c in enumerate(CONDITIONS)},
            "deprivation_fifth": rng.integers(1, 6, n),
        }
    )
    truth_rows = []
    for key, t in _TRUTH.items():
        raw = 0.4 * severity / 0.5 * t["tau"] + rng.normal(
            0.0, t["tau"] * np.sqrt(1 - 0.4**2), n_units
        )
        effect = raw - raw.mean()  # network-centred true unit effects on the log-odds scale
        linear = (
            np.array(t["age"])[age_band]
            + t["male"] * (cohort["sex"] == "M")
            + t["emergency"] * cohort["emergency"]
            + sum(t[c] * cohort[c] for c in CONDITIONS)
        ).to_numpy()
        risk_without_unit = expit(t["intercept"] + linear)
        risk = expit(t["intercept"] + linear + effect[unit_of])
        cohort[key] = (rng.random(n) < risk).astype(int)
        sums = pd.DataFrame({"u": unit_of, "p": risk, "e": risk_without_unit}).groupby("u").sum()
        truth_rows.append(
            pd.DataFrame(
                {
                    "measure": key,
                    "unit_id": unit_ids,
                    "true_effect": effect,
                    "true_ratio": (sums["p"] / sums["e"]).to_numpy(),
                    "true_predicted": sums["p"].to_numpy(),
                }
            )
        )
    # Length of stay: continuous, Gamma-distributed around a case-mix mean and a unit effect.
    t = _STAY
    raw = 0.4 * severity / 0.5 * t["tau"] + rng.normal(0.0, t["tau"] * np.sqrt(1 - 0.4**2), n_units)
    effect = raw - raw.mean()
    linear = (
        np.array(t["age"])[age_band]
        + t["emergency"] * cohort["emergency"]
        + sum(t[c] * cohort[c] for c in CONDITIONS)
        + t["deprivation"] * cohort["deprivation_fifth"]
    ).to_numpy()
    mean = np.exp(t["intercept"] + linear + effect[unit_of])
    cohort["los_days"] = np.maximum(np.round(rng.gamma(t["shape"], mean / t["shape"]), 1), 0.1)
    truth_rows.append(
        pd.DataFrame(
            {
                "measure": "stay",
                "unit_id": unit_ids,
                "true_effect": effect,
                "true_ratio": np.exp(effect),
                "true_predicted": pd.Series(mean)
                .groupby(unit_of)
                .sum()
                .reindex(range(n_units))
                .to_numpy(),
            }
        )
    )
    # Pressure injury: only unit totals leave the units, with expected events from an (invented)
    # external tool.
    t = _PRESSURE
    raw = rng.normal(0.0, t["tau"], n_units)
    effect = raw - raw.mean()
    base = expit(t["intercept"] + np.array(t["age"])[age_band])
    events = rng.random(n) < expit(t["intercept"] + np.array(t["age"])[age_band] + effect[unit_of])
    sums = (
        pd.DataFrame(
            {
                "u": unit_of,
                "e": base,
                "y": events,
                "p": expit(t["intercept"] + np.array(t["age"])[age_band] + effect[unit_of]),
            }
        )
        .groupby("u")
        .sum()
    )
    summary = pd.DataFrame(
        {
            "unit_id": unit_ids,
            "cases": sizes,
            "pressure_injury": sums["y"].astype(int).to_numpy(),
            "expected": sums["e"].round(2).to_numpy(),
        }
    )
    truth_rows.append(
        pd.DataFrame(
            {
                "measure": "pressure",
                "unit_id": unit_ids,
                "true_effect": effect,
                "true_ratio": np.exp(effect),
                "true_predicted": sums["p"].to_numpy(),
            }
        )
    )
    gaps = rng.random(n) < MISSING_DEPRIVATION
    cohort["deprivation_fifth"] = cohort["deprivation_fifth"].astype("Int64").mask(gaps)
    return units, cohort, pd.concat(truth_rows, ignore_index=True), summary


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
