"""Robustness tests: a bad-input corpus, property tests, fault tests and offline checks."""
