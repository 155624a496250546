"""Shared test settings: a deterministic hypothesis profile (no deadline: first calls compile)."""

from hypothesis import settings

settings.register_profile("flowpost", deadline=None, derandomize=True, max_examples=20)
settings.load_profile("flowpost")
