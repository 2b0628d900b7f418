"""Figures and the HTML report: they read results and never recompute them."""
