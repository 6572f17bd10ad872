"""Shared data for the statistics tests: the METHODS.md §15 CSVs and simulations."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest

DATA = Path(__file__).resolve().parent.parent / "data"


def load_csv(name: str) -> dict[str, np.ndarray]:
    """Columns of a METHODS.md §15 CSV (written with %.17g, so exact)."""
    path = DATA / name
    header = path.read_text().splitlines()[0].split(",")
    values = np.loadtxt(path, delimiter=",", skiprows=1)
    return {col: values[:, i] for i, col in enumerate(header)}


@pytest.fixture(scope="session")
def c3() -> dict[str, np.ndarray]:
    return load_csv("C3_binary.csv")


@pytest.fixture(scope="session")
def d2() -> dict[str, np.ndarray]:
    return load_csv("D2_binary.csv")


def _simulate(
    n: int, seed: int, *, a: float = 0.0, b: float = 1.0, mu: float = -1.0, sd: float = 1.5
) -> tuple[np.ndarray, np.ndarray]:
    """Logit-normal scores; outcomes from the recalibrated truth sigmoid(a + b·logit p)."""
    rng = np.random.default_rng(seed)
    z = rng.normal(mu, sd, n)
    p = 1.0 / (1.0 + np.exp(-z))
    truth = 1.0 / (1.0 + np.exp(-(a + b * z)))
    y = (rng.random(n) < truth).astype(np.int64)
    return y, p


Simulate = Callable[..., tuple[np.ndarray, np.ndarray]]


@pytest.fixture(scope="session")
def simulate() -> Simulate:
    """``simulate(n, seed, *, a, b, mu, sd) -> (y, p)``."""
    return _simulate


@pytest.fixture(scope="session")
def realistic() -> tuple[np.ndarray, np.ndarray]:
    """50,000 rows, mildly miscalibrated (a=0.1, b=0.9)."""
    return _simulate(50_000, 20240601, a=0.1, b=0.9)


@pytest.fixture(scope="session")
def breast_cancer_probs() -> tuple[np.ndarray, np.ndarray]:
    """Held-out probabilities of a logistic model on scikit-learn's breast cancer data."""
    from sklearn.datasets import load_breast_cancer
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import cross_val_predict
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    X, y = load_breast_cancer(return_X_y=True)
    model = make_pipeline(StandardScaler(), LogisticRegression(C=0.05, max_iter=2000))
    p = cross_val_predict(model, X, y, cv=5, method="predict_proba")[:, 1]
    return y.astype(np.int64), p
