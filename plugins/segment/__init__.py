"""Segmentation steps: grains found and touching grains split, with tiling for large frames."""
