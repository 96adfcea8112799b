"""Triangulation, the datum frame, and resampling onto the world grid."""
