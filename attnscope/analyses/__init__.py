"""Analyses: pure functions on captures and numpy, and the behavioural probes (causality, padding)."""
