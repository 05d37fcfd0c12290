"""Evaluation of trained runs: length extrapolation, recall probes, generation through the step path."""
