"""Write the invented demo data for the liner trial (deterministic; rerun to reproduce the CSV).

Scenario (invented): a cold-chain carrier ships temperature-sensitive parcels from four depots and
tries a foam insulated liner against its standard liner. Each shipment's logger reports the minutes
spent above 8 °C. A logger that fails reports 1440 (a full day) and is excluded by the plan's filter;
a few shipments lost their logger reading altogether (missing values, dropped and counted).
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

DEPOTS = {"north": 1.0, "east": 1.3, "south": 1.8, "west": 1.1}  # warmer depots, longer excursions
SHIPMENTS_PER_CELL = 30


def main() -> None:
    rng = np.random.default_rng(20261201)
    rows = []
    number = 0
    for depot, heat in DEPOTS.items():
        for liner, effect in (("standard", 1.0), ("foam", 0.72)):
            for _ in range(SHIPMENTS_PER_CELL):
                number += 1
                minutes = rng.gamma(shape=1.6, scale=22.0 * heat * effect)
                if rng.random() < 0.25:  # about a quarter of shipments stay cold throughout
                    minutes = 0.0
                value = f"{minutes:.1f}"
                if rng.random() < 0.006:
                    value = "1440"  # logger failure: stuck at a full day
                elif rng.random() < 0.012:
                    value = ""  # reading lost
                rows.append({"shipment": f"S{number:04d}", "depot": depot, "liner": liner,
                             "route": f"{depot[:1].upper()}-{rng.integers(1, 9)}", "minutes_above_8c": value,
                             "excursion": "" if value == "" else ("yes" if value != "0.0" else "no")})
    out = Path(__file__).parent / "data" / "shipments.csv"
    with out.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(handle, fieldnames=list(rows[0]), lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)


if __name__ == "__main__":
    main()
