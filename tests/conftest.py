"""Shared test settings: a deterministic hypothesis profile (no deadline: first calls compile),
and the order of the run: tests marked ``slow`` (each runs for tens of seconds: notebooks,
subprocesses, long statistical checks) are collected first, so that under ``-n 2`` the two
workers start on them and finish together on the short ones, instead of one worker still
running a long test after the other has run out of work. The order changes nothing else:
every test uses fixed keys of its own."""

from __future__ import annotations

import pytest
from hypothesis import settings

settings.register_profile("flowpost", deadline=None, derandomize=True, max_examples=20)
settings.load_profile("flowpost")


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    items.sort(key=lambda item: item.get_closest_marker("slow") is None)  # stable: slow ones first
