"""Figures (matplotlib, Agg backend), one module per result kind."""
