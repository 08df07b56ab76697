"""Synthetic scenes with analytically known truth, for the demo, the examples and the tests."""
