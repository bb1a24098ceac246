"""Shared fixtures: the generated demo archive and its loopback server."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

from collector.demo_site import DemoServer, generate


@pytest.fixture(scope="session")
def demo_content(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo archive, generated once per test session into a temporary folder."""
    folder = tmp_path_factory.mktemp("demo-content")
    generate(folder)
    return folder


@pytest.fixture(scope="session")
def demo_server(demo_content: Path) -> Iterator[DemoServer]:
    """The demo server (default rates, no maintenance window) for the whole session."""
    with DemoServer(demo_content) as server:
        yield server


@pytest.fixture
def fresh_demo_server(demo_server: DemoServer) -> DemoServer:
    """The session demo server with its log cleared and rate buckets refilled."""
    demo_server.reset()
    return demo_server
