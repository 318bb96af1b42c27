"""Thickness steps: grain thickness from known values or from shadow lengths."""
