"""Checks: the Finding value and thresholds, the finding catalogue, panel contracts and their rules."""
