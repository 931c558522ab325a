"""Figures and the self-contained HTML report."""
