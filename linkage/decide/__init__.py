"""Decisions built on a trained chain: porosity window, what-if, retraining."""
