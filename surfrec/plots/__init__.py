"""Figures for people (matplotlib, Agg backend, imported only when a figure is asked for)."""
