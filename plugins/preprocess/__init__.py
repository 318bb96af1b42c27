"""Preprocessing steps: background flattening and denoising before segmentation."""
