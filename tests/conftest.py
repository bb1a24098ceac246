"""Shared fixtures: the generated demo archive, its loopback server, and the gathers many
tests start from, made once per session (each test that changes one works on its own copy)."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from support.collections import Gathered, folder_digest, gather_once, one_page_recipe

from collector.demo_site import DemoServer, generate
from collector.demo_site.recipes import render


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


def _kept_as_gathered(gathered: Gathered) -> Iterator[Gathered]:
    """Hand out ``gathered``; at the end of the session, fail if any test changed its folder
    (tests change copies: ``Gathered.copy_to``)."""
    before = folder_digest(gathered.root)
    yield gathered
    assert folder_digest(gathered.root) == before, (
        f"a test changed the shared gathered collection {gathered.root}; change a copy of it "
        "(Gathered.copy_to) instead")


@pytest.fixture(scope="session")
def demo_gathered(demo_server: DemoServer, demo_content: Path,
                  tmp_path_factory: pytest.TempPathFactory) -> Iterator[Gathered]:
    """The whole demo archive gathered once per session with the demo recipe, from an empty
    folder, the server reset just before: read it as it is, or copy it to change it."""
    yield from _kept_as_gathered(gather_once(
        demo_server, tmp_path_factory.mktemp("demo-gathered") / "c",
        render("demo", demo_server.port, demo_content / "scans")))


@pytest.fixture(scope="session")
def page_gathered(demo_server: DemoServer,
                  tmp_path_factory: pytest.TempPathFactory) -> Iterator[Gathered]:
    """The demo archive's first listing page of 10 items (``one_page_recipe``) gathered once
    per session, the server reset just before: read it as it is, or copy it to change it."""
    yield from _kept_as_gathered(gather_once(
        demo_server, tmp_path_factory.mktemp("page-gathered") / "c",
        one_page_recipe(demo_server.port)))
