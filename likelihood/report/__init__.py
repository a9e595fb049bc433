"""Posterior summaries and figures; the theory report."""
