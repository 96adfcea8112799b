"""Synthetic stereo speckle runs: surface shapes and rendering (filled in by the lead)."""
