"""Inputs: sources and their formats, the period grid, the validated panel, outputs written whole."""
