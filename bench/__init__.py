"""Benchmarks: each prints its figure, the floor measured in the same run, and the ratio."""
