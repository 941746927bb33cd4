"""Limner bench: speed and quality measurement, reports, plots and pick (no torch)."""
