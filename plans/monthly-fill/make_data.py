"""Write the invented demo data for the monthly fill-weight review (deterministic; rerun to reproduce).

Scenario (invented): a filling site checks, every month, the fill weight of sampled vials from its
two filling heads against the 10.00 g target. Each month's extract is one CSV named by the month
(data/fills-YYYY-MM.csv); the plan is the same every month and names the file through the
parameter `month`.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

MONTHS = {"2026-10": (0.00, 0.02), "2026-11": (0.01, 0.05)}  # invented drift of head B
VIALS_PER_HEAD = 40


def main() -> None:
    folder = Path(__file__).resolve().parent / "data"
    folder.mkdir(exist_ok=True)
    for k, (month, (drift_a, drift_b)) in enumerate(MONTHS.items()):
        rng = np.random.default_rng(20261100 + k)
        rows = []
        for head, drift in (("A", drift_a), ("B", drift_b)):
            for i in range(VIALS_PER_HEAD):
                grams = 10.0 + drift + rng.normal(0.0, 0.06)
                rows.append({"vial": f"{month}-{head}{i + 1:02d}", "head": head, "fill_g": f"{grams:.3f}"})
        with open(folder / f"fills-{month}.csv", "w", newline="", encoding="utf-8") as handle:
            writer = csv.DictWriter(handle, fieldnames=["vial", "head", "fill_g"], lineterminator="\n")
            writer.writeheader()
            writer.writerows(rows)


if __name__ == "__main__":
    main()
