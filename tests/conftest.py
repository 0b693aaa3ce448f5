"""Shared fixtures: a real mosquitto broker started on a free loopback port for one test."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from broker import Broker


@pytest.fixture
def broker(tmp_path: Path) -> Iterator[Broker]:
    """A plain (anonymous, no TLS) broker for one test."""
    b = Broker(tmp_path / "broker")
    yield b
    b.stop()


def pytest_collection_modifyitems(items: list[pytest.Item]) -> None:
    """Tests that use a broker carry the ``broker`` marker, so ``-m "not broker"`` selects the rest."""
    for item in items:
        if "broker" in getattr(item, "fixturenames", ()) or "broker" in item.module.__name__.split("_"):
            item.add_marker(pytest.mark.broker)
