"""Score drift against the baseline: PSI with its null-aware threshold and KS, checked
against scipy and METHODS.md section 9 (J3); drift shows for an immature cohort whose
score distribution moved, before any of its labels arrived."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
import pytest
from scipy import stats
from sqlalchemy.engine import Engine

from plumbwatch.evaluate.drift import PSI_ALPHA, PSI_FLOOR, drift, histogram
from plumbwatch.stats.drift import coarsen_to_reference_quantiles, psi
from plumbwatch.stats.grid import GRID_EDGES, N_BINS, bin_index
from plumbwatch.timefmt import format_instant, parse_instant
from tests.factories import running_service


def test_psi_and_ks_against_scipy_and_the_raw_rows() -> None:
    rng = np.random.default_rng(21)
    for shift, n in ((2.0, 4000), (2.15, 4000), (2.6, 5000)):
        ref, cur = rng.beta(2, 5, n), rng.beta(shift, 5, n)
        metrics, reasons, exceeds = drift(histogram(list(ref)), histogram(list(cur)))
        assert reasons == {}
        # KS: scipy on the raw rows; the grid statistic is a lower bound within the largest
        # one-bin share (plumbwatch.stats.drift.ks_from_counts).
        exact = stats.ks_2samp(ref, cur)
        share = max(np.bincount(bin_index(ref)).max(), np.bincount(bin_index(cur)).max()) / n
        assert metrics["ks_statistic"] <= exact.statistic + 1e-12
        assert exact.statistic - metrics["ks_statistic"] <= share + 1e-12
        # The p-value is scipy's asymptotic one (ks_2samp's formula for large samples) at
        # the grid statistic, so if anything larger than on the raw rows; past an
        # effective size of 1,000, within 0.005 (plumbwatch.stats.drift.ks_from_counts).
        assert metrics["ks_p_value"] == pytest.approx(
            stats.kstwo.sf(metrics["ks_statistic"], round(n / 2)), abs=5e-3
        )
        assert metrics["ks_p_value"] >= exact.pvalue - 5e-3
        # PSI over the reference deciles: the raw-row version (stats.psi, deciles by
        # numpy.quantile) and ours (deciles rounded to grid edges) agree closely.
        assert metrics["psi"] == pytest.approx(psi(ref, cur).psi, abs=0.004)
        # The null-aware threshold: scipy's chi-square quantile of METHODS.md section 9,
        # (1/N + 1/M) chi2_{B-1}, at 1 - 0.01, floored at 0.1 (common practice).
        groups = coarsen_to_reference_quantiles(histogram(list(ref)))
        b = int(groups.max()) + 1
        q = stats.chi2.ppf(1 - PSI_ALPHA, b - 1) * (2 / n)
        assert metrics["psi_threshold"] == pytest.approx(max(q, PSI_FLOOR), rel=1e-12)
        assert exceeds == (metrics["psi"] > metrics["psi_threshold"])
    # J2 (METHODS.md 9): Beta(2, 5) against Beta(2.6, 5), n = 5000 each: D about 0.1568.
    assert metrics["ks_statistic"] == pytest.approx(0.1568, abs=0.02)
    assert exceeds  # a shift that large is drift by any threshold


def test_psi_null_behaviour_matches_the_chi_square_approximation() -> None:
    # METHODS.md J3: with N = M = 2000 and 10 bins the null mean is about
    # (B - 1)(1/N + 1/M) = 0.009 (simulated there: 0.00913) and the 95th percentile
    # 0.0172 against 0.0169 from the approximation.
    rng = np.random.default_rng(3)
    values = []
    for _ in range(400):
        ref, cur = histogram(list(rng.beta(2, 5, 2000))), histogram(list(rng.beta(2, 5, 2000)))
        m, _, exceeds = drift(ref, cur)
        assert not exceeds  # the 0.1 floor is far above the null at this size
        values.append(m["psi"])
    assert np.mean(values) == pytest.approx(0.009, abs=0.0012)
    assert np.quantile(values, 0.95) == pytest.approx(stats.chi2.ppf(0.95, 9) * 0.001, abs=0.0025)


def test_small_samples_need_more_than_a_fixed_cut() -> None:
    # At N = M = 100 the null 99th percentile is about 0.43 (METHODS.md section 9): a fixed
    # 0.25 would flag noise; the threshold follows the sample size.
    rng = np.random.default_rng(5)
    m, _, _ = drift(histogram(list(rng.beta(2, 5, 100))), histogram(list(rng.beta(2, 5, 100))))
    assert m["psi_threshold"] > 0.25
    empty, reasons, flag = drift(None, histogram([0.2]))
    assert empty["psi"] is None and reasons["psi"] == "no_baseline" and not flag
    assert drift(histogram([0.3, 0.4]), np.zeros(N_BINS))[1]["ks_statistic"] == "no_rows"
    assert GRID_EDGES.size == N_BINS + 1


T0 = parse_instant("2026-03-02T00:00:00Z")


def test_drift_shows_for_an_immature_cohort_before_its_labels(engine: Engine) -> None:
    rng = np.random.default_rng(8)
    preds, outs = [], []
    for day in range(13):
        for zone in ("a", "b"):
            shifted = day >= 10 and zone == "a"
            p = rng.beta(4, 3, 150) if shifted else rng.beta(2, 5, 150)
            for i, pi in enumerate(p):
                at = T0 + timedelta(days=day, minutes=int(rng.integers(0, 1440)))
                rid = f"{day}-{zone}-{i}"
                preds.append(
                    {
                        "id": rid,
                        "predicted_at": format_instant(at),
                        "probability": float(pi),
                        "version": "v1",
                        "segments": {"zone": zone},
                    }
                )
                if day < 10:  # the last three days have no label yet
                    outs.append(
                        {
                            "id": rid,
                            "outcome": int(rng.random() < pi),
                            "observed_at": format_instant(at + timedelta(hours=5)),
                        }
                    )
    with running_service(engine) as svc:
        svc.put_model(
            "m",
            {
                "kind": "binary",
                "label_horizon": "P3D",
                "segment_keys": ["zone"],
                "windows": ["P7D"],
            },
        )
        assert svc.post("/v1/models/m/predictions", {"predictions": preds}).status_code == 200
        assert svc.post("/v1/models/m/outcomes", {"outcomes": outs}).status_code == 200
        r = svc.post("/v1/models/m/evaluations", {"as_of": format_instant(T0 + timedelta(days=13))})
        assert r.status_code == 200, r.text
        record = r.json()
    # Baseline: the first matured seven days of v1 (days 0-6); the P7D window holds
    # days 3-9 (matured, unshifted); days 10-12 are immature and unlabelled.
    assert record["baseline"] == {
        "v1": {
            "start": "2026-03-02T00:00:00Z",
            "end": "2026-03-09T00:00:00Z",
            "source": "first_window",
        }
    }
    immature = {e["slice"]: e for e in record["immature"]}
    assert immature["zone:a"]["label_coverage"] == 0.0
    assert immature["zone:a"]["signals"]["score_drift"]
    assert immature["zone:a"]["metrics"]["psi"] > immature["zone:a"]["metrics"]["psi_threshold"]
    assert immature["zone:a"]["metrics"]["ks_p_value"] < 1e-6
    assert not immature["zone:b"]["signals"]["score_drift"]
    assert immature["zone:b"]["metrics"]["ks_p_value"] > 0.001
    matured = {s["slice"]: s for s in record["windows"][0]["slices"]}
    assert not any(s["signals"]["score_drift"] for s in matured.values())
    assert matured["zone:a"]["metrics"]["psi"] < 0.1
