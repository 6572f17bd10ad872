"""End to end through HTTP: a reference data set in, status and metrics out, checked
against scikit-learn and statsmodels computed directly on the same rows."""

from __future__ import annotations

import warnings
from datetime import timedelta

import numpy as np
import pytest
import statsmodels.api as sm
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import brier_score_loss, log_loss, roc_auc_score
from sklearn.model_selection import cross_val_predict
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sqlalchemy.engine import Engine
from statsmodels.tools.sm_exceptions import PerfectSeparationWarning

from plumbwatch.timefmt import format_instant, parse_instant
from tests.factories import running_service

START = parse_instant("2026-04-01T00:00:00Z")
AS_OF = "2026-05-20T00:00:00Z"  # every cohort of April matured (horizon 5 days)


@pytest.fixture(scope="module")
def reference() -> dict[str, np.ndarray]:
    # scikit-learn's bundled breast-cancer data with a logistic model; out-of-fold
    # probabilities, so they are honest predictions of unseen rows.
    x, y = load_breast_cancer(return_X_y=True)
    model = make_pipeline(StandardScaler(), LogisticRegression(C=0.05, max_iter=1000))
    p = cross_val_predict(model, x, y, cv=5, method="predict_proba")[:, 1]
    rng = np.random.default_rng(7)
    day = rng.integers(0, 30, size=y.size)  # predictions spread over 30 days
    region = np.where(x[:, 0] > np.median(x[:, 0]), "inland", "coast")  # an observable split
    tier = rng.choice(["express", "standard"], size=y.size)
    delay_h = rng.integers(1, 96, size=y.size)  # outcomes 1-95 hours later, within 5 days
    return {"y": y, "p": p, "day": day, "region": region, "tier": tier, "delay_h": delay_h}


def _post_all(svc, ref) -> None:
    svc.put_model(
        "cancer",
        {
            "kind": "binary",
            "label_horizon": "P5D",
            "segment_keys": ["region", "tier"],
            "crosses": [["region", "tier"]],
            "windows": ["P28D", "P7D"],
        },
    )
    preds, outs = [], []
    for i in range(ref["y"].size):
        at = START + timedelta(days=int(ref["day"][i]), hours=i % 24)
        preds.append(
            {
                "id": f"r{i}",
                "predicted_at": format_instant(at),
                "probability": float(ref["p"][i]),
                "version": "v1",
                "segments": {"region": str(ref["region"][i]), "tier": str(ref["tier"][i])},
            }
        )
        outs.append(
            {
                "id": f"r{i}",
                "outcome": int(ref["y"][i]),
                "observed_at": format_instant(at + timedelta(hours=int(ref["delay_h"][i]))),
            }
        )
    # Outcomes first for half the rows: they must be joined when the prediction comes.
    assert svc.post("/v1/models/cancer/outcomes", {"outcomes": outs[::2]}).status_code == 200
    assert svc.post("/v1/models/cancer/predictions", {"predictions": preds}).status_code == 200
    assert svc.post("/v1/models/cancer/outcomes", {"outcomes": outs[1::2]}).status_code == 200


def _window_rows(ref, days: int, end_day: int) -> np.ndarray:
    return (ref["day"] >= end_day - days) & (ref["day"] < end_day)


def _check(metrics: dict, y: np.ndarray, p: np.ndarray) -> None:
    assert metrics["n"] == y.size
    assert metrics["events"] == int(y.sum())
    # scikit-learn log_loss / brier_score_loss / roc_auc_score on the same rows.
    assert metrics["log_loss"] == pytest.approx(log_loss(y, p, labels=[0, 1]), rel=1e-9)
    assert metrics["brier"] == pytest.approx(brier_score_loss(y, p), rel=1e-9)
    assert metrics["auroc"] == pytest.approx(roc_auc_score(y, p), abs=1e-3)
    # statsmodels GLM: Cox intercept and slope on logit(p) (clipped at 1e-6, METHODS 5.1),
    # and calibration-in-the-large with logit(p) as offset. Grid approximation: bounds in
    # plumbwatch.stats.cox; 5e-3 covers them on 500 rows.
    z = np.log(np.clip(p, 1e-6, 1 - 1e-6) / (1 - np.clip(p, 1e-6, 1 - 1e-6)))
    with warnings.catch_warnings():
        warnings.simplefilter("error", PerfectSeparationWarning)
        try:
            cox = sm.GLM(y, sm.add_constant(z), family=sm.families.Binomial()).fit()
        except PerfectSeparationWarning:
            # On small, very confident slices statsmodels itself declines: no reference.
            return
    assert metrics["cox_intercept"] == pytest.approx(cox.params[0], abs=5e-3)
    assert metrics["calibration_slope"] == pytest.approx(cox.params[1], abs=5e-3)
    citl = sm.GLM(y, np.ones((y.size, 1)), family=sm.families.Binomial(), offset=z).fit()
    assert metrics["calibration_intercept"] == pytest.approx(citl.params[0], abs=5e-3)
    assert metrics["oe_ratio"] == pytest.approx(y.sum() / p.sum(), rel=1e-9)


def test_status_matches_reference_libraries(engine: Engine, reference) -> None:
    with running_service(engine) as svc:
        _post_all(svc, reference)
        r = svc.post("/v1/models/cancer/evaluations", {"as_of": AS_OF})
        assert r.status_code == 200, r.text
        status = svc.client.get("/v1/models/cancer/status", headers=svc.headers("read")).json()
        assert status == r.json()
    assert status["as_of"] == AS_OF
    p28 = next(w for w in status["windows"] if w["window"] == "P28D")
    # Frontier 2026-05-15: the last complete matured day is 05-14, so P28D covers
    # 04-17 .. 05-14, i.e. April days 16..29 of the data (days 0..29 from 04-01).
    assert (p28["start"], p28["end"]) == ("2026-04-17T00:00:00Z", "2026-05-15T00:00:00Z")
    rows = _window_rows(reference, 14, 30)
    slices = {s["slice"]: s for s in p28["slices"]}
    _check(slices["overall"]["metrics"], reference["y"][rows], reference["p"][rows])
    one = rows & (reference["region"] == "coast")
    _check(slices["region:coast"]["metrics"], reference["y"][one], reference["p"][one])
    cross = one & (reference["tier"] == "express")
    _check(
        slices["region:coast,tier:express"]["metrics"], reference["y"][cross], reference["p"][cross]
    )
    assert slices["overall"]["metrics"]["label_coverage"] == 1.0
    # The heavily regularised model (C=0.05) is far too cautious: statsmodels' GLM on
    # logit p puts the calibration slope near 3.8 and its LR test rejects a=0, b=1, so the
    # evidence crosses K/alpha and the miscalibration is material: drifting.
    y, p = reference["y"][rows], reference["p"][rows]
    z = np.log(p / (1 - p))
    fit = sm.GLM(y, sm.add_constant(z), family=sm.families.Binomial()).fit()
    null = float(np.sum(y * np.log(p) + (1 - y) * np.log1p(-p)))
    assert fit.params[1] > 3 and 2 * (fit.llf - null) > 25  # chi2(2) p below 4e-6
    overall = slices["overall"]
    assert overall["metrics"]["log_evidence"] >= overall["metrics"]["log_threshold"]
    assert overall["signals"]["evidence"] and overall["signals"]["material"]
    assert overall["health"] == "drifting" == status["health"]
