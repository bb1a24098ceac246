"""Recipes for the demo archive; ``{port}`` and ``{scans}`` are filled by ``render``."""

from __future__ import annotations

from importlib import resources
from pathlib import Path


def names() -> list[str]:
    """The recipe names shipped with the demo (file names without .toml)."""
    folder = resources.files(__package__)
    return sorted(p.name[:-5] for p in folder.iterdir() if p.name.endswith(".toml"))


def render(name: str, port: int, scans_dir: Path | None = None) -> str:
    """Return recipe ``name`` as TOML text with the server port and scans folder filled in.

    The scans path goes into a TOML literal string ('...'), so it must not contain a
    single quote.
    """
    text = resources.files(__package__).joinpath(f"{name}.toml").read_text("utf-8")
    scans = Path(scans_dir).as_posix() if scans_dir is not None else "scans"
    if "'" in scans:
        raise ValueError(f"scans folder {scans!r} contains a single quote; choose another")
    return text.replace("{port}", str(int(port))).replace("{scans}", scans)


def listing_source(name: str, url: str, *, pagination: str = 'style = "none"') -> str:
    """A ``[[sources]]`` table (TOML text) for a JSON listing at ``url``: its ``results``,
    each with ``id``, ``title``, ``licence`` and ``image`` (the loopback listings the tests
    and benches serve); one page unless ``pagination`` (the lines of its
    ``[sources.pagination]`` table) says otherwise."""
    return f'''[[sources]]
name = "{name}"
kind = "json_api"
url = "{url}"
[sources.pagination]
{pagination}
[sources.fields]
items = "results"
id = "id"
title = "title"
licence = "licence"
image_url = "image"
'''
