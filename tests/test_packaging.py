"""The installed distribution: one top-level package, ``collector``, with its data files.

A wheel is built from this checkout (PEP 427 wheel, PEP 517 build through the project's own
setuptools backend, without build isolation so no network is needed) and its file list read.
"""

from __future__ import annotations

import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def wheel_names(tmp_path_factory: pytest.TempPathFactory) -> list[str]:
    """The names of every file in a wheel built from this checkout."""
    out = tmp_path_factory.mktemp("wheel")
    build = tmp_path_factory.mktemp("build")
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--quiet", "--no-deps",
                    "--no-build-isolation", "--wheel-dir", str(out), str(REPO)],
                   check=True, cwd=build, capture_output=True, timeout=300)
    wheels = list(out.glob("*.whl"))
    assert len(wheels) == 1
    with zipfile.ZipFile(wheels[0]) as wheel:
        return wheel.namelist()


def test_the_wheel_installs_a_single_top_level_package(wheel_names: list[str]) -> None:
    """Everything but the .dist-info metadata lives under collector/: no top-level
    'sources' or 'demo_site' that could collide with other installed packages."""
    tops = {name.split("/", 1)[0] for name in wheel_names}
    assert {t for t in tops if not t.endswith(".dist-info")} == {"collector"}


def test_the_wheel_holds_the_adapters_the_demo_and_the_data_files(wheel_names: list[str]) -> None:
    """The adapters and the demo archive are inside the package, with the recipe template
    and the demo recipes."""
    names = set(wheel_names)
    for expected in ("collector/sources/json_api.py", "collector/sources/scans.py",
                     "collector/demo_site/server.py", "collector/demo_site/recipes/demo.toml",
                     "collector/templates/recipe.toml", "collector/run/gather.py",
                     "collector/templates/datasheet.html.j2",
                     "collector/templates/datasheet.md.j2",
                     "collector/templates/datasheet_block.md.j2",
                     "collector/templates/datasheet.css"):
        assert expected in names, expected
