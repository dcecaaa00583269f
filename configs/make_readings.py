"""Write configs/readings.csv: invented kiln readings for the CSV example sweep.

Twelve sensor columns folded from three hidden process factors, and a string
label `outcome` (sound / crazed / warped) decided by a nonlinear rule.
"""
from __future__ import annotations

import csv
from pathlib import Path


from depthplan.train.datasets import synthetic_scenario

COLUMNS = [f"sensor_{i:02d}" for i in range(12)]
OUTCOMES = ["sound", "crazed", "warped"]


def main() -> None:
    x, y = synthetic_scenario(n_samples=900, n_features=len(COLUMNS), n_latent=3, n_classes=3,
                              noise=0.2, seed=11)
    path = Path(__file__).with_name("readings.csv")
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow([*COLUMNS, "outcome"])
        for row, label in zip(x, y):
            w.writerow([f"{v:.4f}" for v in row] + [OUTCOMES[label]])
    print(f"wrote {path} ({len(y)} rows)")


if __name__ == "__main__":
    main()
