"""Shared test settings."""

from hypothesis import settings

settings.register_profile("ci", max_examples=60, deadline=None)
settings.register_profile("dev", max_examples=30, deadline=None)
settings.load_profile("ci")
