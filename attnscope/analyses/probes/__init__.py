"""Machinery of the behavioural probes: calling ``fn`` on perturbed inputs, and finding the module to blame.

The public functions live in :mod:`attnscope.analyses.causality`.
"""
