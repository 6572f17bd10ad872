"""Evaluation: cohorts, maturity, windows, slices, and one evaluation run."""
