"""Benchmarks (not part of the test suite): run ``python -m benchmarks.run``."""
