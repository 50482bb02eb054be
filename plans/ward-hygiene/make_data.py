"""Write the invented demo data for the ward hygiene study (deterministic; rerun to reproduce the CSVs).

Scenario (invented): a hospital group tries a new hand-gel dispenser. Twelve wards are randomized,
six to the dispenser and six to usual practice (cluster randomization: every session on a ward has
the ward's arm). Observers record hand-hygiene compliance (% of opportunities) in sessions before
and after the change. A bench study compares a new dispenser pump coating with the old one on three
endpoints measured on the same specimens.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent / "data"


def main() -> None:
    rng = np.random.default_rng(20261202)
    wards = [f"ward-{k:02d}" for k in range(1, 13)]
    arms = ["dispenser"] * 6 + ["usual"] * 6
    order = rng.permutation(12)
    arm_of = {wards[i]: arms[j] for j, i in enumerate(order)}
    sessions, ward_rows = [], []
    for ward in wards:
        base = rng.normal(62, 6)
        staff = round(float(rng.uniform(0.8, 1.6)), 2)
        beds = int(rng.integers(18, 36))
        for period in ("before", "after"):
            lift = 7.0 if (period == "after" and arm_of[ward] == "dispenser") else 0.0
            values = []
            for s in range(int(rng.integers(3, 6))):
                value = float(np.clip(base + lift + 3.0 * (staff - 1.2) + rng.normal(0, 4), 0, 100))
                values.append(value)
                sessions.append([ward, arm_of[ward], period, f"{ward}-{period}-{s + 1}", round(value, 1)])
            ward_rows.append([ward, arm_of[ward], period, round(float(np.mean(values)), 2), staff, beds])
    HERE.mkdir(exist_ok=True)
    with open(HERE / "sessions.csv", "w", newline="") as handle:
        w = csv.writer(handle)
        w.writerow(["ward", "arm", "period", "session", "compliance"])
        w.writerows(sessions)
    with open(HERE / "wards.csv", "w", newline="") as handle:
        w = csv.writer(handle)
        w.writerow(["ward", "arm", "period", "compliance", "staff_per_bed", "beds"])
        w.writerows(ward_rows)
    with open(HERE / "bench.csv", "w", newline="") as handle:
        w = csv.writer(handle)
        w.writerow(["specimen", "coating", "wear_um", "friction", "temperature_c"])
        for k in range(16):
            coating = "new" if k < 8 else "old"
            new = coating == "new"
            w.writerow([f"s{k + 1:02d}", coating, round(float(rng.normal(41 if new else 47, 4)), 1),
                        round(float(rng.normal(0.31 if new else 0.33, 0.03)), 3),
                        round(float(rng.normal(36.0, 1.2)), 1)])


if __name__ == "__main__":
    main()
