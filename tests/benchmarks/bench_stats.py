"""Sketch path against a raw pandas groupby, for the binary metrics.

Run ``python tests/benchmarks/bench_stats.py [--rows N]``; prints a table.
Not a test: numbers depend on the machine and its load.

Scenario: 10,000,000 rows over 100 slices and 28 daily cohorts.
1. build: one ``Sketch.from_arrays_grouped`` call per day over the 100
   slices (2,800 sketches), and one plain ``from_arrays`` over all rows;
2. merge: 28 daily sketches per slice, for all 100 slices;
3. metrics: ``binary_metrics`` of one slice's merged sketch (median of 30);
4. raw: a straightforward pandas groupby over the same 10M rows, computing
   the same metrics per slice with the raw-array functions.
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd

from plumbwatch.stats import calibration as cal
from plumbwatch.stats import corp, cox, discrimination, scores
from plumbwatch.stats.sketch import Sketch
from plumbwatch.stats.summary import binary_metrics

N_SLICES = 100
N_DAYS = 28


def timed(f: Callable[[], Any]) -> tuple[float, Any]:
    t = time.perf_counter()
    out = f()
    return time.perf_counter() - t, out


def simulate(n: int, seed: int = 7) -> tuple[np.ndarray, ...]:
    rng = np.random.default_rng(seed)
    slices = rng.integers(0, N_SLICES, n)
    days = np.sort(rng.integers(0, N_DAYS, n))  # rows arrive in time order
    z = rng.normal(-1.0, 1.5, n) + 0.2 * (slices % 5)
    p = 1.0 / (1.0 + np.exp(-z))
    y = (rng.random(n) < 1.0 / (1.0 + np.exp(-(0.1 + 0.9 * z)))).astype(np.int8)
    return y, p, slices, days


def raw_metrics(y: np.ndarray, p: np.ndarray) -> dict[str, float]:
    """The same metrics from raw rows, written the obvious way."""
    d = scores.brier_decomposition(y, p, n_bins=10)
    hl = cal.hosmer_lemeshow(y, p)
    sp = cal.spiegelhalter_z(y, p)
    oe = cal.observed_expected(y, p)
    joint = cox.cox_calibration(y, p)
    cd = corp.corp_decomposition(y, p)
    return {
        "n": float(y.size), "events": float(y.sum()), "mean_predicted": float(p.mean()),
        "observed_rate": float(y.mean()), "log_loss": scores.log_loss(y, p),
        "brier": scores.brier_score(y, p), "brier_reliability": d.reliability,
        "brier_resolution": d.resolution, "brier_uncertainty": d.uncertainty,
        "ece": cal.expected_calibration_error(y, p),
        "ece_15": cal.expected_calibration_error(y, p, n_bins=15),
        "ece_equal_mass": cal.expected_calibration_error(y, p, strategy="quantile"),
        "ece_debiased": cal.l2_calibration_error(y, p),
        "hl_statistic": hl.statistic, "hl_df": float(hl.df), "hl_p_value": hl.p_value,
        "spiegelhalter_z": sp.z, "spiegelhalter_p_value": sp.p_value,
        "calibration_intercept": cox.calibration_in_the_large(y, p).intercept,
        "calibration_slope": joint.slope, "cox_intercept": joint.intercept,
        "oe_ratio": oe.ratio, "oe_ratio_low": oe.low, "oe_ratio_high": oe.high,
        "auroc": discrimination.roc_auc(y, p),
        "average_precision": discrimination.average_precision(y, p),
        "mcb": cd.brier.mcb, "dsc": cd.brier.dsc, "unc": cd.brier.unc,
        "mcb_log": cd.log.mcb, "dsc_log": cd.log.dsc, "unc_log": cd.log.unc,
    }  # fmt: skip


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=10_000_000)
    args = parser.parse_args()
    n = args.rows
    y, p, slices, days = simulate(n)
    rows: list[tuple[str, str, str]] = []

    # 1. build
    day_starts = np.searchsorted(days, np.arange(N_DAYS + 1))

    def build_daily() -> list[list[Sketch]]:
        out = []
        for d in range(N_DAYS):
            a, b = day_starts[d], day_starts[d + 1]
            out.append(Sketch.from_arrays_grouped(y[a:b], p[a:b], slices[a:b], N_SLICES))
        return out

    Sketch.from_arrays(y[:1000], p[:1000])  # warm up
    t_build, daily = timed(build_daily)
    t_single, _ = timed(lambda: Sketch.from_arrays(y, p))
    rows.append(
        ("build 28 days x 100 slices", f"{t_build:.2f} s", f"{n / t_build / 1e6:.1f} M rows/s")
    )
    rows.append(
        ("build one sketch (all rows)", f"{t_single:.2f} s", f"{n / t_single / 1e6:.1f} M rows/s")
    )

    # 2. merge
    t_merge, merged = timed(
        lambda: [Sketch.sum(daily[d][k] for d in range(N_DAYS)) for k in range(N_SLICES)]
    )
    rows.append(
        (
            "merge 28 dailies, 100 slices",
            f"{t_merge * 1e3:.1f} ms",
            f"{t_merge / N_SLICES * 1e3:.3f} ms/slice",
        )
    )
    blob = merged[0].to_bytes()
    rows.append(
        ("serialised merged slice", f"{len(blob)} B", f"{len(blob) / merged[0].n:.2f} B/row")
    )

    # 3. metrics
    binary_metrics(merged[0])
    one = [timed(lambda: binary_metrics(merged[0]))[0] for _ in range(30)]
    t_one = float(np.median(one))
    rows.append(("metrics, one slice (median)", f"{t_one * 1e3:.2f} ms", "target < 5 ms"))
    t_all, _ = timed(lambda: [binary_metrics(m) for m in merged])
    t_sketch = t_merge + t_all
    rows.append(("metrics, 100 slices", f"{t_all * 1e3:.0f} ms", ""))

    # 4. raw pandas groupby over the 28-day window
    df = pd.DataFrame({"slice": slices, "y": y, "p": p})

    def raw() -> dict[int, dict[str, float]]:
        return {
            int(key): raw_metrics(g["y"].to_numpy(), g["p"].to_numpy())
            for key, g in df.groupby("slice", sort=True)
        }

    t_raw, raw_values = timed(raw)
    rows.append(("pandas groupby, 100 slices", f"{t_raw:.2f} s", ""))
    rows.append(("speed-up: merge+metrics vs raw", f"{t_raw / t_sketch:.0f}x", "target >= 20x"))
    rows.append(
        (
            "speed-up: build+merge+metrics",
            f"{t_raw / (t_sketch + t_build):.1f}x",
            "(build is paid once, at ingestion)",
        )
    )

    sketch_values, _ = binary_metrics(merged[0])
    worst = max(
        abs(float(sketch_values[k] or 0.0) - v)
        for k, v in raw_values[0].items()
        if k in ("log_loss", "brier", "ece", "spiegelhalter_z")
    )
    rows.append(("max |sketch - raw|, exact metrics", f"{worst:.1e}", "slice 0"))
    auc_gap = abs(float(sketch_values["auroc"] or 0.0) - raw_values[0]["auroc"])
    rows.append(("|auroc sketch - raw|", f"{auc_gap:.1e}", "slice 0"))

    width = max(len(r[0]) for r in rows)
    print(f"rows={n:,} slices={N_SLICES} days={N_DAYS}")
    for name, value, note in rows:
        print(f"{name:<{width}}  {value:>14}  {note}")


if __name__ == "__main__":
    main()
