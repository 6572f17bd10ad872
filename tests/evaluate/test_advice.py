"""Recalibration advice: the maps fitted on per-day sketches recover a known distortion,
the verdicts say recalibrate, retrain or no action where they should, cross-fitted gains
sit below in-sample ones; multiclass temperature scaling through the real path."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.special import expit, logit
from sklearn.metrics import roc_auc_score
from sqlalchemy.engine import Engine

from plumbwatch.evaluate.advice import advise_slice, auroc_se
from plumbwatch.evaluate.verdicts import Tolerances
from plumbwatch.stats.recalibration import cross_fitted_gain
from plumbwatch.stats.sketch import Sketch
from plumbwatch.timefmt import format_instant, parse_instant
from tests.factories import running_service

DAYS = 6
PER_DAY = 2000


def scores(rng: np.random.Generator, n: int) -> np.ndarray:
    return np.clip(rng.beta(2, 5, n), 1e-4, 1 - 1e-4)


def days_of(y: np.ndarray, p: np.ndarray) -> list[Sketch]:
    return [Sketch.from_arrays(y[i::DAYS], p[i::DAYS]) for i in range(DAYS)]


def total(sketches: list[Sketch]) -> Sketch:
    out = sketches[0]
    for s in sketches[1:]:
        out = out + s
    return out


def calibrated(rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    p = scores(rng, DAYS * PER_DAY)
    return (rng.random(p.size) < p).astype(float), p


@pytest.fixture(scope="module")
def baseline() -> Sketch:
    y, p = calibrated(np.random.default_rng(0))
    return Sketch.from_arrays(y, p)


def distorted(rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    # The truth is sigmoid(-0.4 + 0.7 logit s) (the METHODS.md section 10 check's map).
    p = scores(rng, DAYS * PER_DAY)
    return (rng.random(p.size) < expit(-0.4 + 0.7 * logit(p))).astype(float), p


def test_platt_recovers_a_known_logistic_distortion() -> None:
    # Miscalibrated since the version started: the baseline window has the same
    # distortion, so discrimination held (a slope below 1 in the truth lowers the AUROC
    # the scores can reach, which a map cannot restore; here it was always so).
    rng = np.random.default_rng(1)
    baseline = Sketch.from_arrays(*distorted(rng))
    y, p = distorted(rng)
    days = days_of(y, p)
    advice = advise_slice(days, total(days), baseline, Tolerances(), fit=True)
    assert advice["verdict"] == "recalibrate", advice["explanation"]
    platt = next(c for c in advice["candidates"] if c["method"] == "platt")
    # statsmodels' GLM on the raw rows is the reference fit; the grouped bins (0.1 logit
    # wide) move it by far less than its standard error.
    glm = sm.GLM(y, sm.add_constant(logit(p)), family=sm.families.Binomial()).fit()
    assert platt["params"] == pytest.approx(list(glm.params), abs=0.01)
    # And it recovers the truth within 3 standard errors.
    assert abs(platt["params"][0] + 0.4) < 3 * glm.bse[0]
    assert abs(platt["params"][1] - 0.7) < 3 * glm.bse[1]
    # The honest gain: cross-fitted by day blocks, close to the library's random 5-fold
    # estimate on raw rows, and below the in-sample gain for every map (METHODS.md 10:
    # isotonic most optimistic).
    raw = cross_fitted_gain(y, p, "platt")
    assert platt["gain_log_loss"] == pytest.approx(raw.mean, abs=0.002)
    for c in advice["candidates"]:
        assert c["gain_log_loss"] < c["in_sample_gain"]
        lo, hi = c["gain_interval"]
        assert lo < c["gain_log_loss"] < hi
    iso = next(c for c in advice["candidates"] if c["method"] == "isotonic")
    assert (
        iso["in_sample_gain"] - iso["gain_log_loss"]
        > platt["in_sample_gain"] - platt["gain_log_loss"]
    )
    # The knot table reproduces the fitted map (interpolating in logit).
    knots = np.array(advice["knots"])
    grid = np.linspace(0.02, 0.9, 50)
    interpolated = expit(np.interp(logit(grid), logit(knots[:, 0]), logit(knots[:, 1])))
    best = next(c for c in advice["candidates"] if c["method"] == advice["method"])
    if advice["method"] == "platt":
        a, b = best["params"]
        assert interpolated == pytest.approx(expit(a + b * logit(grid)), abs=1e-3)


def test_noise_in_the_scores_means_retrain(baseline: Sketch) -> None:
    # Outcomes follow the calibrated scores, but the model now outputs them with noise on
    # the logit scale: ranking power falls (AUROC, by scikit-learn, drops by about 0.1).
    rng = np.random.default_rng(2)
    truth = scores(rng, DAYS * PER_DAY)
    y = (rng.random(truth.size) < truth).astype(float)
    p = expit(logit(truth) + rng.normal(0, 1.5, truth.size))
    assert roc_auc_score(y, truth) - roc_auc_score(y, p) > 0.08
    days = days_of(y, p)
    advice = advise_slice(days, total(days), baseline, Tolerances(), fit=True)
    assert advice["verdict"] == "retrain", advice["explanation"]
    assert advice["baseline_auroc"] - advice["auroc"] > advice["auroc_drop_limit"]
    assert advice["auroc"] == pytest.approx(roc_auc_score(y, p), abs=1e-3)


def test_calibrated_data_needs_no_action(baseline: Sketch) -> None:
    y, p = calibrated(np.random.default_rng(3))
    days = days_of(y, p)
    advice = advise_slice(days, total(days), baseline, Tolerances(), fit=True)
    assert advice["verdict"] == "no action", advice["explanation"]
    for c in advice["candidates"]:
        assert c["gain_log_loss"] < c["in_sample_gain"]
    # Without fit (a slice), nothing material means no maps at all.
    lean = advise_slice(days, total(days), baseline, Tolerances(), fit=False)
    assert lean["verdict"] == "no action" and lean["candidates"] == []
    assert lean["gain_log_loss"] is None and lean["knots"] is None


def test_hanley_mcneil_standard_error() -> None:
    # Hanley & McNeil (1982), equation 2 (the formula from memory): checked against the
    # spread of scikit-learn's AUROC over simulated samples of 50 positives and 50
    # negatives (binormal, true AUROC about 0.8).
    rng = np.random.default_rng(9)
    aucs = []
    for _ in range(400):
        pos, neg = rng.normal(1.19, 1, 50), rng.normal(0, 1, 50)
        aucs.append(roc_auc_score(np.r_[np.ones(50), np.zeros(50)], np.r_[pos, neg]))
    mean = float(np.mean(aucs))
    assert auroc_se(mean, 50, 50) == pytest.approx(np.std(aucs), rel=0.15)


T0 = parse_instant("2026-02-02T00:00:00Z")
CLASSES = ["on_time", "late", "lost"]


def test_multiclass_temperature_advice_through_the_real_path(engine: Engine) -> None:
    # True class probabilities from a Dirichlet; the model reports them sharpened with
    # temperature 0.6 (over-confident). The fitted temperature undoes it (about 1/0.6
    # applied to the model's output, i.e. T near 1.67), and the advice says recalibrate.
    rng = np.random.default_rng(12)
    n = 3600
    truth = rng.dirichlet([2.0, 1.0, 0.5], n)
    y = np.array([rng.choice(3, p=row) for row in truth])
    sharp = truth ** (1 / 0.6)
    sharp /= sharp.sum(axis=1, keepdims=True)
    preds, outs = [], []
    for i in range(n):
        at = T0 + timedelta(days=int(i % 12), minutes=i % 1400)
        preds.append(
            {
                "id": f"r{i}",
                "predicted_at": format_instant(at),
                "probabilities": dict(zip(CLASSES, map(float, sharp[i]), strict=True)),
            }
        )
        outs.append({"id": f"r{i}", "outcome": CLASSES[y[i]], "observed_at": format_instant(at)})
    with running_service(engine) as svc:
        svc.put_model(
            "mc",
            {
                "kind": "multiclass",
                "classes": CLASSES,
                "label_horizon": "P1D",
                "windows": ["P7D", "P28D"],
            },
        )
        for k in range(0, n, 1000):
            assert svc.post("/v1/models/mc/predictions", {"predictions": preds[k : k + 1000]})
            assert svc.post("/v1/models/mc/outcomes", {"outcomes": outs[k : k + 1000]})
        r = svc.post(
            "/v1/models/mc/evaluations", {"as_of": format_instant(T0 + timedelta(days=14))}
        )
        assert r.status_code == 200, r.text
        got = svc.client.get("/v1/models/mc/recalibration", headers=svc.headers("read"))
    assert got.status_code == 200, got.text
    advice = got.json()
    assert advice == r.json()["recalibration"]
    assert advice["method"] == "temperature" and advice["knots"] is None
    assert advice["params"][0] == pytest.approx(1 / 0.6, rel=0.1)
    assert advice["verdict"] == "recalibrate", advice["explanation"]
    assert advice["gain_log_loss"] < advice["in_sample_gain"] + 1e-3
