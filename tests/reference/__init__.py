"""Slow, obvious reference implementations used by the tests."""
