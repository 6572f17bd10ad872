"""Multiclass models through the real evaluation path: scikit-learn's bundled digits
data with a logistic model, checked against scikit-learn on the same rows."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
import pytest
import sqlalchemy as sa
from scipy.optimize import minimize_scalar
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import log_loss
from sklearn.model_selection import cross_val_predict
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sqlalchemy.engine import Engine

from plumbwatch.evaluate.rebuild import rebuild_model
from plumbwatch.stats.multiclass import MulticlassSketch, classwise_ece, top_label_ece
from plumbwatch.store.models import get
from plumbwatch.store.tables import sketches
from plumbwatch.timefmt import format_instant, parse_instant
from tests.factories import running_service

T0 = parse_instant("2026-04-01T00:00:00Z")
CLASSES = [str(d) for d in range(10)]


@pytest.fixture(scope="module")
def digits() -> tuple[np.ndarray, np.ndarray]:
    x, y = load_digits(return_X_y=True)
    model = make_pipeline(StandardScaler(), LogisticRegression(C=0.01, max_iter=2000))
    p = cross_val_predict(model, x, y, cv=5, method="predict_proba")
    p = p / p.sum(axis=1, keepdims=True)  # exact row sums for the 1e-6 ingest tolerance
    return y, p


def test_multiclass_status_matches_scikit_learn(engine: Engine, digits) -> None:
    y, p = digits
    n = 600
    days = np.arange(n) % 10
    with running_service(engine) as svc:
        svc.put_model(
            "digits",
            {
                "kind": "multiclass",
                "classes": CLASSES,
                "label_horizon": "P2D",
                "segment_keys": ["scanner"],
                "windows": ["P28D"],
            },
        )
        preds = [
            {
                "id": f"r{i}",
                "predicted_at": format_instant(T0 + timedelta(days=int(days[i]))),
                "probabilities": dict(zip(CLASSES, map(float, p[i]), strict=True)),
                "segments": {"scanner": "a" if i % 2 else "b"},
            }
            for i in range(n)
        ]
        outs = [
            {
                "id": f"r{i}",
                "outcome": CLASSES[y[i]],
                "observed_at": format_instant(T0 + timedelta(days=int(days[i]), hours=5)),
            }
            for i in range(n)
        ]
        assert svc.post("/v1/models/digits/predictions", {"predictions": preds}).status_code == 200
        assert svc.post("/v1/models/digits/outcomes", {"outcomes": outs[:500]}).status_code == 200
        first = svc.post("/v1/models/digits/evaluations", {"as_of": "2026-04-20T00:00:00Z"})
        assert first.status_code == 200, first.text
        # The rest arrive late (a new-outcome delta), and one is corrected (a minus delta).
        assert svc.post("/v1/models/digits/outcomes", {"outcomes": outs[500:]}).status_code == 200
        wrong = dict(outs[3], outcome=CLASSES[(y[3] + 1) % 10])
        r = svc.post("/v1/models/digits/outcomes?correction=true", {"outcomes": [wrong]})
        assert r.json()["corrections"] == 1
        record = svc.post("/v1/models/digits/evaluations", {"as_of": "2026-04-20T01:00:00Z"}).json()
        with engine.connect() as conn:
            incremental = {
                (r.version, r.day, r.slice): r.data for r in conn.execute(sa.select(sketches))
            }
            model = get(conn=conn, name="digits")
        assert model is not None
        rebuild_model(engine, model, now_us=0, slice_cap=50)
        with engine.connect() as conn:
            rebuilt = {
                (r.version, r.day, r.slice): r.data for r in conn.execute(sa.select(sketches))
            }
    assert incremental.keys() == rebuilt.keys()
    for key in incremental:
        a, b = (
            MulticlassSketch.from_bytes(incremental[key]),
            MulticlassSketch.from_bytes(rebuilt[key]),
        )
        assert a.sum_log_loss == pytest.approx(b.sum_log_loss, rel=1e-9)
        assert a.top.allclose(b.top)
    y_now = y[:n].copy()
    y_now[3] = (y[3] + 1) % 10
    overall = next(s for s in record["windows"][0]["slices"] if s["slice"] == "overall")
    m = overall["metrics"]
    assert m["n"] == n
    # scikit-learn log_loss over the same rows (natural log, eps clipping).
    assert m["log_loss"] == pytest.approx(log_loss(y_now, p[:n], labels=range(10)), rel=1e-9)
    # Brier summed over classes, range [0, 2] (METHODS.md 1.2), by hand.
    onehot = np.eye(10)[y_now]
    assert m["brier"] == pytest.approx(
        float(np.mean(np.sum((p[:n] - onehot) ** 2, axis=1))), rel=1e-9
    )
    # The raw-array functions, themselves checked against METHODS.md C4.
    assert m["ece_top_label"] == pytest.approx(top_label_ece(y_now, p[:n], n_bins=15), abs=1e-12)
    assert m["ece_classwise"] == pytest.approx(classwise_ece(y_now, p[:n], n_bins=15), abs=1e-12)
    assert m["events_by_class"] == {c: int((y_now == int(c)).sum()) for c in CLASSES}
    assert m["class:3:n"] == n and m["class:3:events"] == int((y_now == 3).sum())
    # The heavily regularised model (C=0.01) is far too cautious: the temperature that
    # minimises the log loss (scipy, METHODS.md section 10) is well below 1. The evidence
    # stream (temperature alternatives) crosses its threshold; with fewer than 100
    # misclassified rows there is no verdict on materiality, so the slice is on watch.
    log_p = np.log(np.clip(p[:n], 1e-12, 1))

    def nll(t: float) -> float:
        z = log_p / t
        z -= z.max(axis=1, keepdims=True)
        return float(-np.mean(z[np.arange(n), y_now] - np.log(np.exp(z).sum(axis=1))))

    t_hat = minimize_scalar(nll, bounds=(0.05, 20), method="bounded").x
    assert t_hat < 0.7
    assert m["log_evidence"] >= m["log_threshold"]
    assert overall["signals"]["evidence"] and not overall["signals"]["material"]
    assert overall["health"] == "watch"
    assert record["immature"] == [] or record["immature"][0]["metrics"]["mean_predicted"] is None
