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


def test_the_distribution_has_a_name_of_its_own(wheel_names: list[str]) -> None:
    """The distribution is "polite-image-collector" (the name "collector" on the Python
    package index belongs to an unrelated project; checked with `pip index versions`, see
    DEVELOPERS.md); the import name and the command stay `collector`. Wheel file names use
    the normalised name (PEP 427, PEP 503 normalisation)."""
    dist_infos = {name.split("/", 1)[0] for name in wheel_names if ".dist-info/" in name}
    assert len(dist_infos) == 1
    (dist_info,) = dist_infos
    assert dist_info.startswith("polite_image_collector-")
    entry_points = [n for n in wheel_names if n.endswith("entry_points.txt")]
    assert entry_points, "the wheel declares the collector command"
