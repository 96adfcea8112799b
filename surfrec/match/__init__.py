"""Speckle correlation matching between the rectified views (ZNCC search, sub-pixel refinement)."""
