"""Evaluation: metrics, no-reference figures, SURE, detail checks, baseline tuning, the compare report."""
