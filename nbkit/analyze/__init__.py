"""Curvature, gradient noise, findings and loss-landscape slices: pure analysis of recordings."""
