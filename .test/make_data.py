"""Writes the tiny invented extracts of the workflow check (.test/data/*.csv): two cohorts of
120 people, a lab marker, age and a yes/no outcome whose log-odds rise with the marker.
Run from the repository root: python .test/make_data.py (the files are committed)."""

from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent

for seed, cohort in ((11, "east"), (12, "west")):
    rng = np.random.default_rng(seed)
    n = 120
    marker = rng.normal(50.0, 12.0, n).round(1)
    age = rng.uniform(40.0, 80.0, n).round(0)
    logit = -1.0 + 0.05 * (marker - 50.0) + 0.02 * (age - 60.0)
    event = (rng.random(n) < 1.0 / (1.0 + np.exp(-logit))).astype(int)
    frame = pd.DataFrame({"marker": marker, "age": age, "event": event})
    frame.to_csv(HERE / "data" / f"{cohort}.csv", index=False)
