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


def invent_network(seed: int = 7, n_units: int = 44, smallest: int = 10, largest: int = 4000):
    """Make the unit table, the cohort, the true effects and the unit totals of an invented network
    (the random draws in a fixed order: one seed gives one network)."""
    rng = np.random.default_rng(seed)
    sizes, units = _invent_units(rng, n_units, smallest, largest)
    unit_ids = list(units["id"])
    severity = rng.normal(0.0, 0.5, n_units)  # how sick each unit's patients are
    unit_of = np.repeat(np.arange(n_units), sizes)
    cohort, age_band = _invent_cohort(rng, severity, unit_of, unit_ids)
    truth_rows = _binary_outcomes(rng, cohort, severity, unit_of, age_band, unit_ids)
    truth_rows.append(_length_of_stay(rng, cohort, severity, unit_of, age_band, unit_ids))
    summary, pressure_truth = _pressure_totals(rng, sizes, unit_of, age_band, unit_ids)
    truth_rows.append(pressure_truth)
    gaps = rng.random(len(unit_of)) < MISSING_DEPRIVATION
    cohort["deprivation_fifth"] = cohort["deprivation_fifth"].astype("Int64").mask(gaps)
    return units, cohort, pd.concat(truth_rows, ignore_index=True), summary


def _invent_units(
    rng: np.random.Generator, n_units: int, smallest: int, largest: int
) -> tuple[np.ndarray, pd.DataFrame]:
    """Unit sizes (largest first, spanning smallest..largest) and the unit table."""
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
    units = pd.DataFrame(
        {
            "id": [f"mv{i + 1:02d}" for i in range(n_units)],
            "name": [f"{n} {_KINDS[k][1]}" for n, k in zip(names, kind_of, strict=True)],
            "kind": [_KINDS[k][0] for k in kind_of],
        }
    )
    return sizes, units


def _invent_cohort(
    rng: np.random.Generator, severity: np.ndarray, unit_of: np.ndarray, unit_ids: list[str]
) -> tuple[pd.DataFrame, np.ndarray]:
    """Patient rows with their risk factors (sicker units have sicker patients); the age bands."""
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
    return cohort, age_band


def _unit_effects(rng: np.random.Generator, severity: np.ndarray, tau: float) -> np.ndarray:
    """Network-centred true unit effects, correlated 0.4 with the units' severity."""
    raw = 0.4 * severity / 0.5 * tau + rng.normal(0.0, tau * np.sqrt(1 - 0.4**2), len(severity))
    return raw - raw.mean()


def _binary_outcomes(
    rng: np.random.Generator,
    cohort: pd.DataFrame,
    severity: np.ndarray,
    unit_of: np.ndarray,
    age_band: np.ndarray,
    unit_ids: list[str],
) -> list[pd.DataFrame]:
    """Each binary outcome's column in ``cohort`` (in place) and its true unit effects."""
    truth_rows = []
    for key, t in _TRUTH.items():
        effect = _unit_effects(rng, severity, t["tau"])  # on the log-odds scale
        linear = (
            np.array(t["age"])[age_band]
            + t["male"] * (cohort["sex"] == "M")
            + t["emergency"] * cohort["emergency"]
            + sum(t[c] * cohort[c] for c in CONDITIONS)
        ).to_numpy()
        risk_without_unit = expit(t["intercept"] + linear)
        risk = expit(t["intercept"] + linear + effect[unit_of])
        cohort[key] = (rng.random(len(unit_of)) < risk).astype(int)
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
    return truth_rows


def _length_of_stay(
    rng: np.random.Generator,
    cohort: pd.DataFrame,
    severity: np.ndarray,
    unit_of: np.ndarray,
    age_band: np.ndarray,
    unit_ids: list[str],
) -> pd.DataFrame:
    """Length of stay (in place): Gamma-distributed around a case-mix mean and a unit effect."""
    t = _STAY
    effect = _unit_effects(rng, severity, t["tau"])
    linear = (
        np.array(t["age"])[age_band]
        + t["emergency"] * cohort["emergency"]
        + sum(t[c] * cohort[c] for c in CONDITIONS)
        + t["deprivation"] * cohort["deprivation_fifth"]
    ).to_numpy()
    mean = np.exp(t["intercept"] + linear + effect[unit_of])
    cohort["los_days"] = np.maximum(np.round(rng.gamma(t["shape"], mean / t["shape"]), 1), 0.1)
    predicted = pd.Series(mean).groupby(unit_of).sum().reindex(range(len(unit_ids)))
    return pd.DataFrame(
        {
            "measure": "stay",
            "unit_id": unit_ids,
            "true_effect": effect,
            "true_ratio": np.exp(effect),
            "true_predicted": predicted.to_numpy(),
        }
    )


def _pressure_totals(
    rng: np.random.Generator,
    sizes: np.ndarray,
    unit_of: np.ndarray,
    age_band: np.ndarray,
    unit_ids: list[str],
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Pressure injury: only unit totals leave the units, with expected events from an (invented)
    external tool. (unit totals, true effects)."""
    t = _PRESSURE
    raw = rng.normal(0.0, t["tau"], len(unit_ids))
    effect = raw - raw.mean()
    base = expit(t["intercept"] + np.array(t["age"])[age_band])
    risk = expit(t["intercept"] + np.array(t["age"])[age_band] + effect[unit_of])
    events = rng.random(len(unit_of)) < risk
    sums = pd.DataFrame({"u": unit_of, "e": base, "y": events, "p": risk}).groupby("u").sum()
    summary = pd.DataFrame(
        {
            "unit_id": unit_ids,
            "cases": sizes,
            "pressure_injury": sums["y"].astype(int).to_numpy(),
            "expected": sums["e"].round(2).to_numpy(),
        }
    )
    truth = pd.DataFrame(
        {
            "measure": "pressure",
            "unit_id": unit_ids,
            "true_effect": effect,
            "true_ratio": np.exp(effect),
            "true_predicted": sums["p"].to_numpy(),
        }
    )
    return summary, truth
