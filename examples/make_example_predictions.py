"""Write ``northgate_predictions.csv``: an invented predictions table for demos and tests.

Northgate General is an invented hospital; every patient, case, vendor and number in the
file is made up by the seeded generator below. The file shows the predictions table a
site keeps: several observations per patient, a model score and a 1..5 category, a
binary reader (``reader_a``) and an ordinal 1..5 reader (``reader_b``), scanner
attributes, acquisition dates and a few cases whose reference standard is still pending.

Invented data, for demonstration only: not clinical data and not for clinical use.

Run ``python examples/make_example_predictions.py`` to write the file next to this script;
``--seed N --out PATH`` writes another invented hospital's table (a trial with several
sites on one machine).
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
import pandas as pd

SEED = 20240611
N_PATIENTS = 250
OUTPUT = Path(__file__).with_name("northgate_predictions.csv")
VENDORS = ("Altavue", "Koristo", "Meridex")
VENDOR_SHIFT = {"Altavue": 0.0, "Koristo": 0.35, "Meridex": -0.3}
AGE_BANDS = ("40-49", "50-59", "60-69", "70+")


def make_predictions(seed: int = SEED) -> pd.DataFrame:
    """Return the invented predictions table (deterministic for a given seed)."""
    rng = np.random.default_rng(seed)
    per_patient = rng.choice([1, 2, 3], size=N_PATIENTS, p=[0.5, 0.35, 0.15])
    patient = np.repeat(np.arange(N_PATIENTS), per_patient)
    n = patient.size

    diseased_patient = rng.random(N_PATIENTS) < 0.3
    label = (diseased_patient[patient] & (rng.random(n) < 0.8)).astype(int)
    vendor_of_patient = rng.choice(VENDORS, size=N_PATIENTS, p=[0.45, 0.35, 0.2])
    vendor = vendor_of_patient[patient]
    patient_effect = rng.normal(0.0, 0.5, N_PATIENTS)[patient]
    shift = np.array([VENDOR_SHIFT[v] for v in vendor])
    logit = -1.3 + 2.6 * label + shift + patient_effect + rng.normal(0.0, 0.9, n)
    score = np.round(1.0 / (1.0 + np.exp(-logit)), 4)

    category = np.clip(np.digitize(score + rng.normal(0, 0.06, n), [0.2, 0.4, 0.6, 0.8]) + 1, 1, 5)
    reader_a = np.where(label == 1, rng.random(n) < 0.82, rng.random(n) < 0.12).astype(int)
    reader_b = np.clip(np.round(1.8 + 2.2 * label + rng.normal(0, 0.9, n)), 1, 5).astype(int)

    start = np.datetime64("2023-01-02")
    acquired = start + rng.integers(0, 545, size=n).astype("timedelta64[D]")
    pending = acquired >= np.datetime64("2024-06-10")

    frame = pd.DataFrame(
        {
            "case_id": [f"NG-C{i + 1:04d}" for i in range(n)],
            "patient_id": [f"NG-P{p + 1:03d}" for p in patient],
            "label": [("" if pend else str(y)) for y, pend in zip(label, pending, strict=True)],
            "score": score,
            "category": category,
            "reader_a": [
                "" if miss else str(c)
                for c, miss in zip(reader_a, rng.random(n) < 0.08, strict=True)
            ],
            "reader_b": [
                "" if miss else str(c)
                for c, miss in zip(reader_b, rng.random(n) < 0.15, strict=True)
            ],
            "acquired_on": acquired.astype(str),
            "scanner_vendor": vendor,
            "field_strength": rng.choice(["1.5T", "3T"], size=N_PATIENTS, p=[0.6, 0.4])[patient],
            "sex": rng.choice(["F", "M"], size=N_PATIENTS)[patient],
            "age_band": rng.choice(AGE_BANDS, size=N_PATIENTS, p=[0.2, 0.3, 0.3, 0.2])[patient],
        }
    )
    return frame


def main() -> None:
    """Write the example file (or, with ``--seed`` and ``--out``, another one)."""
    parser = argparse.ArgumentParser(
        description="Write an invented predictions table (demonstration only; sitepool is a "
        "research tool, not a medical device, not for clinical decisions)."
    )
    parser.add_argument("--seed", type=int, default=SEED, help="generator seed")
    parser.add_argument("--out", type=Path, default=OUTPUT, help="CSV file to write")
    args = parser.parse_args()
    args.out.parent.mkdir(parents=True, exist_ok=True)
    make_predictions(args.seed).to_csv(args.out, index=False, lineterminator="\n")
    print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
