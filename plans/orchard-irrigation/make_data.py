"""Write the invented demo data for the orchard irrigation trial (deterministic; rerun to reproduce the CSV).

Scenario (invented): a fruit growers' cooperative compares drip irrigation with the overhead
sprinklers its members use. Twelve orchards are randomized, six to drip and six to sprinklers
(every plot of an orchard gets the orchard's system). Each plot's apple yield (kg per tree) was
weighed in the season before the change (baseline) and in the trial season; inspectors also noted
whether a plot showed leaf scab at the end of the season. The pre-specified primary analysis is the
difference in trial-season yield adjusted for baseline yield and soil type (ANCOVA); the key
secondary analysis is the standardised difference in the share of plots with scab.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent / "data"


def main() -> None:
    rng = np.random.default_rng(20261203)
    orchards = [f"orchard-{k:02d}" for k in range(1, 13)]
    systems = ["drip"] * 6 + ["sprinkler"] * 6
    order = rng.permutation(12)
    system_of = {orchards[i]: systems[j] for j, i in enumerate(order)}
    rows = []
    plot = 0
    for orchard in orchards:
        orchard_effect = rng.normal(0.0, 1.5)
        for _ in range(int(rng.integers(16, 25))):
            soil = ["loam", "clay", "sand"][int(rng.integers(0, 3))]
            plot += 1
            drip = system_of[orchard] == "drip"
            baseline = rng.normal(38.0, 6.0) + orchard_effect + {"loam": 2.0, "clay": 0.0, "sand": -3.0}[soil]
            trial = (6.0 + 0.85 * baseline + (2.2 if drip else 0.0) + 0.5 * orchard_effect
                     + rng.normal(0.0, 3.0 + 0.05 * baseline))
            risk = 1.0 / (1.0 + np.exp(-(-0.4 - (0.9 if drip else 0.0) + 0.04 * (baseline - 38.0))))
            scab = bool(rng.random() < risk)
            rows.append([f"P{plot:04d}", orchard, system_of[orchard], soil, f"{baseline:.1f}", f"{trial:.1f}",
                         "yes" if scab else "no"])
    HERE.mkdir(exist_ok=True)
    with (HERE / "plots.csv").open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(["plot", "orchard", "system", "soil", "yield_before", "yield_trial", "scab"])
        writer.writerows(rows)


if __name__ == "__main__":
    main()
