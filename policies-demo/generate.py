"""Write the demo scenarios' invented data. Seeded: running it again gives the same files.

Everything here is made up for the demo; nothing is measured from a real packhouse
or a real claims desk.

    python policies-demo/generate.py
"""

from __future__ import annotations

import csv
import hashlib
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent

# Packhouse grading: four measurements per fruit on the line.
PACKHOUSE_FEATURES = ("firmness_n", "blush_frac", "mass_g", "brix")
PACKHOUSE_CLASSES = {
    # grade: (mean, standard deviations, correlation of firmness with brix)
    "premium": ((48.0, 0.65, 210.0, 14.5), (4.0, 0.10, 18.0, 1.0), 0.35),
    "standard": ((42.0, 0.45, 185.0, 12.8), (5.0, 0.12, 22.0, 1.2), 0.25),
    "defect": ((30.0, 0.35, 170.0, 11.5), (7.0, 0.15, 30.0, 1.6), 0.10),
}
TRAINING_MIX = {"premium": 0.50, "standard": 0.35, "defect": 0.15}
SEASON_MIX = {"premium": 0.55, "standard": 0.35, "defect": 0.10}

# Claims routing: an upstream fraud model trained on a balanced sample.
FRAUD_RATE = 0.03
SCORE_SHIFT = 2.2  # separation of the upstream model's score between the classes
OVER_CONFIDENCE = 2.0  # the upstream model's log-odds are this many times too large (as if trained too long)


def _fruit(rng: np.random.Generator, grade: str, n: int) -> np.ndarray:
    mean, sd, rho = PACKHOUSE_CLASSES[grade]
    corr = np.eye(4)
    corr[0, 3] = corr[3, 0] = rho
    cov = np.outer(sd, sd) * corr
    rows = rng.multivariate_normal(mean, cov, size=n)
    rows[:, 1] = np.clip(rows[:, 1], 0.0, 1.0)
    return rows


def _packhouse_rows(rng: np.random.Generator, n: int, mix: dict[str, float]) -> list[tuple[str, np.ndarray]]:
    grades = rng.choice(list(mix), size=n, p=list(mix.values()))
    return [(g, _fruit(rng, g, 1)[0]) for g in grades]


def _write(path: Path, header: list[str], rows: list[list[object]]) -> None:
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(header)
        writer.writerows(rows)
    print(f"{path.relative_to(HERE)}: {len(rows)} rows, sha256 {hashlib.sha256(path.read_bytes()).hexdigest()}")


def _fruit_cells(x: np.ndarray) -> list[str]:
    return [f"{x[0]:.2f}", f"{x[1]:.3f}", f"{x[2]:.1f}", f"{x[3]:.2f}"]


def packhouse(rng: np.random.Generator) -> None:
    folder = HERE / "packhouse"
    train = _packhouse_rows(rng, 2400, TRAINING_MIX)
    _write(folder / "train.csv", [*PACKHOUSE_FEATURES, "grade"], [[*_fruit_cells(x), g] for g, x in train])
    holdout = _packhouse_rows(rng, 800, SEASON_MIX)
    _write(
        folder / "holdout.csv",
        ["item_id", *PACKHOUSE_FEATURES, "grade"],
        [[f"F{i:05d}", *_fruit_cells(x), g] for i, (g, x) in enumerate(holdout)],
    )
    incoming = _packhouse_rows(rng, 600, SEASON_MIX)
    _write(
        folder / "incoming.csv",
        ["item_id", *PACKHOUSE_FEATURES],
        [[f"N{i:05d}", *_fruit_cells(x)] for i, (_, x) in enumerate(incoming)],
    )


def packhouse_reference(rng: np.random.Generator) -> None:
    """Labelled rows of a past week on the line, for the operating limits of policy-r6.yaml."""
    rows = _packhouse_rows(rng, 8000, SEASON_MIX)
    _write(
        HERE / "packhouse" / "reference.csv",
        ["item_id", *PACKHOUSE_FEATURES, "grade"],
        [[f"R{i:05d}", *_fruit_cells(x), g] for i, (g, x) in enumerate(rows)],
    )


def _claims(rng: np.random.Generator, n: int, fraud_rate: float) -> tuple[np.ndarray, np.ndarray]:
    fraud = rng.random(n) < fraud_rate
    score = rng.normal(np.where(fraud, SCORE_SHIFT, 0.0), 1.0)
    # On a balanced sample the calibrated probability is P_bal(fraud|s) = σ(log LR(s)); the upstream model is
    # over-confident and reports σ(OVER_CONFIDENCE · log LR(s)), which calibration on labelled data can undo.
    log_lr = SCORE_SHIFT * score - SCORE_SHIFT**2 / 2
    p_fraud = 1.0 / (1.0 + np.exp(-OVER_CONFIDENCE * log_lr))
    return fraud, np.clip(p_fraud, 1e-6, 1 - 1e-6)


def _claim_cells(p_fraud: float) -> list[str]:
    fraud = round(p_fraud, 6)
    return [f"{1.0 - fraud:.6f}", f"{fraud:.6f}"]


def claims(rng: np.random.Generator) -> None:
    folder = HERE / "claims"
    fraud, p = _claims(rng, 4000, 0.5)
    _write(
        folder / "calibration.csv",
        ["p_legitimate", "p_fraudulent", "outcome"],
        [[*_claim_cells(pi), "fraudulent" if f else "legitimate"] for f, pi in zip(fraud, p, strict=True)],
    )
    brier = float(np.mean((np.round(p, 6) - fraud) ** 2))
    print(f"claims calibration sample Brier score: {brier:.4f}")
    fraud, p = _claims(rng, 3000, FRAUD_RATE)
    amounts = rng.lognormal(7.0, 0.8, size=fraud.size)
    _write(
        folder / "holdout.csv",
        ["claim_id", "amount_eur", "p_legitimate", "p_fraudulent", "outcome"],
        [
            [f"C{i:05d}", f"{a:.2f}", *_claim_cells(pi), "fraudulent" if f else "legitimate"]
            for i, (f, pi, a) in enumerate(zip(fraud, p, amounts, strict=True))
        ],
    )
    fraud, p = _claims(rng, 1000, FRAUD_RATE)
    _write(
        folder / "incoming.csv",
        ["claim_id", "p_legitimate", "p_fraudulent"],
        [[f"K{i:05d}", *_claim_cells(pi)] for i, pi in enumerate(p)],
    )


if __name__ == "__main__":
    generator = np.random.default_rng(20261201)
    packhouse(generator)
    claims(generator)
    # its own stream, so adding the reference week left the files above unchanged
    packhouse_reference(np.random.default_rng(20261206))
