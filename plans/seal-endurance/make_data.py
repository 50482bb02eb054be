"""Write the invented demo data of the seal endurance study (deterministic; rerun to reproduce the CSVs).

Scenario (invented): a maker of dosing pumps compares a new fluoro-elastomer shaft seal with the
current nitrile seal. 120 pumps (60 per compound) run on three test rigs until the seal first leaks;
the test stops at 1000 hours, so pumps still dry then are censored, and a few pumps are taken off
test early for unrelated reasons (censored at that time). Separately, rinse water from each seal is
analysed for a plasticiser by two laboratories whose detection limits are 0.2 and 0.5 µg/L; a value
below the limit is reported as the limit with detected = 0.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent / "data"
TEST_END = 1000.0


def main() -> None:
    rng = np.random.default_rng(20261218)
    HERE.mkdir(exist_ok=True)
    with open(HERE / "endurance.csv", "w", newline="") as handle:
        w = csv.writer(handle)
        w.writerow(["pump", "compound", "rig", "hours", "leaked"])
        for k in range(120):
            compound = "fluoro" if k % 2 == 0 else "nitrile"
            rig = f"rig-{k % 3 + 1}"
            scale = (820.0 if compound == "fluoro" else 560.0) * {"rig-1": 1.0, "rig-2": 0.9, "rig-3": 1.1}[rig]
            failure = scale * rng.weibull(1.6)
            removed = rng.uniform(50, 3000) if rng.random() < 0.15 else np.inf  # taken off test early
            end = min(failure, removed, TEST_END)
            w.writerow([f"p{k + 1:03d}", compound, rig, round(float(end)), int(end == failure)])
    with open(HERE / "rinse.csv", "w", newline="") as handle:
        w = csv.writer(handle)
        w.writerow(["sample", "compound", "lab", "plasticiser_ugl", "detected"])
        for k in range(48):
            compound = "fluoro" if k % 2 == 0 else "nitrile"
            lab, limit = ("lab-a", 0.2) if k % 4 < 2 else ("lab-b", 0.5)
            value = float(rng.lognormal(np.log(0.35 if compound == "fluoro" else 0.9), 0.8))
            detected = value >= limit
            w.writerow([f"r{k + 1:02d}", compound, lab, round(value if detected else limit, 2), int(detected)])


if __name__ == "__main__":
    main()
