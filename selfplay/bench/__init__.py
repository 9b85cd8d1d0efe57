"""Benchmarks behind `selfplay bench`."""
