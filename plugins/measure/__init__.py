"""Measurement steps: calibrated size and shape descriptors and fitted outlines of every grain."""
