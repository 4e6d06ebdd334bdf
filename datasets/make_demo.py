"""Make the invented demo data: trial-class sign-ups at the branches of a fictional studio chain.

Nothing here is real. Each branch's true sign-up rate is drawn from a Beta population
(mean 0.18, concentration 60: between-branch sd about 0.05); visitor numbers run from 2 to
several thousand, log-uniformly; one branch opened this week and has no visitors yet.
Run ``python datasets/make_demo.py`` to rebuild both files; the seed fixes them.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

SEED = 20261201
MEAN, CONCENTRATION = 0.18, 60.0
FIRST = [
    "Alder",
    "Birch",
    "Cedar",
    "Dune",
    "Ember",
    "Fern",
    "Granite",
    "Heath",
    "Iris",
    "Juniper",
    "Kestrel",
    "Larch",
    "Moss",
    "Nettle",
    "Oriel",
    "Pebble",
    "Quarry",
    "Rowan",
    "Sorrel",
    "Thistle",
]
SECOND = ["Quay", "Row", "Yard", "Cross"]
REGIONS = ["North", "Coast", "Valley", "City"]


def make(seed: int = SEED) -> tuple[pd.DataFrame, pd.DataFrame]:
    rng = np.random.default_rng(seed)
    names = [f"{a} {b}" for b in SECOND for a in FIRST][:64]
    rng.shuffle(names)
    g = len(names)
    true_rate = rng.beta(MEAN * CONCENTRATION, (1 - MEAN) * CONCENTRATION, size=g)
    visitors = np.round(np.exp(rng.uniform(np.log(2), np.log(6000), size=g))).astype(int)
    visitors[0] = 0  # opened this week
    visitors[1:4] = [2, 3, 5]  # a few tiny branches, where raw rates mislead most
    signups = rng.binomial(visitors, true_rate)
    region = [REGIONS[i % len(REGIONS)] for i in range(g)]
    data = pd.DataFrame(
        {"branch": names, "region": region, "signups": signups, "visitors": visitors}
    )
    truth = pd.DataFrame({"branch": names, "true_rate": true_rate})
    return data, truth


if __name__ == "__main__":
    here = Path(__file__).resolve().parent
    data, truth = make()
    data.to_csv(here / "branch_signups.csv", index=False)
    truth.to_csv(here / "branch_signups_truth.csv", index=False, float_format="%.6f")
    print(f"wrote {len(data)} branches to {here}")
