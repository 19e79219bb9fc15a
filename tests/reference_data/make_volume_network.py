"""Writes volume_network.csv: an invented network for the lme4 comparison (tests/test_targets.py).

40 units of 30 to 800 patients; one patient risk factor x; small units truly worse (log-odds
effect -0.3 per unit of log cases, plus Normal(0, 0.3) noise). Patients with the same unit and
x (rounded to 0.1) are pooled into one row: unit, x, cases, events, log_cases (the unit's).
Invented data, not any real network.

    python tests/reference_data/make_volume_network.py
"""

from pathlib import Path

import numpy as np
import pandas as pd
from scipy.special import expit

rng = np.random.default_rng(20261203)
units = 40
size = np.round(np.exp(rng.uniform(np.log(30), np.log(800), units))).astype(int)
unit = np.repeat(np.arange(units), size)
x = rng.normal(rng.normal(0, 0.4, units)[unit], 1.0).round(1)
effect = -0.3 * (np.log(size) - np.log(size).mean()) + rng.normal(0, 0.3, units)
y = (rng.random(len(unit)) < expit(-2.0 + 0.5 * x + effect[unit])).astype(int)
cells = (
    pd.DataFrame({"unit": unit, "x": x, "y": y})
    .groupby(["unit", "x"])
    .agg(cases=("y", "size"), events=("y", "sum"))
    .reset_index()
)
cells["log_cases"] = np.log(size)[cells["unit"]]
cells.to_csv(Path(__file__).with_name("volume_network.csv"), index=False, float_format="%.10g")
