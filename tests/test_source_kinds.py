"""Source kinds are plug-ins: the registry, kinds from other packages (entry points), their
errors, lazy loading, and no kind names outside sources/."""

from __future__ import annotations

import ast
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from collector import sources
from collector.errors import SourceKindError
from collector.sources import SourceKind
from collector.storage.collection import init_collection

REPO = Path(__file__).resolve().parent.parent

TOY_MODULE = '''
"""A toy source kind living outside collector: the PNG files of one folder."""
from pathlib import Path

from collector.schema import Key
from collector.sources import Candidate, SourceKind


def list_candidates(source, fetcher, notes, base_dir):
    folder = Path(base_dir) / source["folder"]
    for path in sorted(folder.glob("*.png")):
        yield Candidate(source_key=path.name, local_path=path, title=path.stem,
                        licence_raw=source["licence"])


KIND = SourceKind(
    name="toykind",
    keys={"folder": Key("str", required=True), "licence": Key("str", required=True)},
    list_candidates=list_candidates,
    uses_network=False,
    mechanism="toy files from a folder",
    collection_type="Others",
)
'''


def write_plugin(root: Path, entry_points: str) -> Path:
    """A package folder as an installer leaves it: toy_kind.py plus a dist-info folder whose
    entry_points.txt holds entry_points (importlib.metadata finds it on sys.path)."""
    root.mkdir(parents=True, exist_ok=True)
    (root / "toy_kind.py").write_text(TOY_MODULE, encoding="utf-8")
    info = root / "toy_kind-0.1.dist-info"
    info.mkdir()
    (info / "METADATA").write_text("Metadata-Version: 2.1\nName: toy-kind\nVersion: 0.1\n",
                                   encoding="utf-8")
    (info / "entry_points.txt").write_text(f"[collector.sources]\n{entry_points}\n",
                                           encoding="utf-8")
    return root


def run_python(code: str, *paths: Path, cwd: Path) -> dict:
    """Run code in a fresh interpreter with paths first on sys.path; its last stdout line is
    JSON."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([*map(str, paths), str(REPO),
                                         env.get("PYTHONPATH", "")])
    done = subprocess.run([sys.executable, "-c", textwrap.dedent(code)], env=env, cwd=cwd,
                          capture_output=True, text=True, timeout=300, check=False)
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout.strip().splitlines()[-1])


def picture(seed: int) -> Image.Image:
    """A picture with real structure, different for each seed."""
    rng = np.random.default_rng(seed)
    return Image.fromarray(rng.integers(0, 255, (6, 8, 3), dtype=np.uint8)).resize(
        (320, 240), Image.BICUBIC)


def test_a_kind_from_another_package_gathers_into_the_ledger(tmp_path: Path) -> None:
    """A kind registered only through the collector.sources entry-point group is validated,
    listed and gathered: its items end stored in the ledger, and the registry gives its own
    words for the datasheet."""
    plugin = write_plugin(tmp_path / "site", "toykind = toy_kind:KIND")
    col = init_collection(tmp_path / "c", contact="me@example.org")
    (col.root / "inbox").mkdir()
    picture(1).save(col.root / "inbox" / "first.png")
    picture(2).save(col.root / "inbox" / "second.png")
    col.recipe_path.write_text(col.recipe_path.read_text() + (
        '\n[[sources]]\nname = "toy"\nkind = "toykind"\nfolder = "inbox"\n'
        'licence = "CC0-1.0"\n'), encoding="utf-8")
    out = run_python(f"""
        import json
        from pathlib import Path
        from collector.storage.collection import open_collection
        from collector.run.gather import gather
        from collector import sources

        col = open_collection(Path({str(col.root)!r}))
        result = gather(col, fetcher_factory=lambda recipe, ledger: None)
        print(json.dumps({{"outcome": result.outcome, "kinds": sources.kind_names(),
                          "mechanism": sources.get_kind("toykind").mechanism}}))
    """, plugin, cwd=tmp_path)
    assert out["outcome"] == "finished"
    assert "toykind" in out["kinds"]
    assert out["mechanism"] == "toy files from a folder"
    with col.ledger(readonly=True) as ledger:
        rows = ledger.query("SELECT i.source_key, i.state, s.kind FROM items i "
                            "JOIN sources s ON s.id = i.source_id ORDER BY i.source_key")
        stored = ledger.query("SELECT count(*) AS n FROM files")[0]["n"]
    assert [tuple(r.values()) for r in rows] == [("first.png", "stored", "toykind"),
                                                 ("second.png", "stored", "toykind")]
    assert stored == 2


def test_a_plugin_kind_with_a_built_in_name_is_refused_clearly(tmp_path: Path) -> None:
    """An entry point claiming the name of a built-in kind is an error naming the package and
    the entry point, at the source that uses the name."""
    plugin = write_plugin(tmp_path / "site", "scans = toy_kind:KIND")
    out = run_python("""
        import json
        from pathlib import Path
        from collector.errors import RecipeError
        from collector.config.recipe import parse_recipe
        text = ('contact = "me@example.org"\\n'
                '[[sources]]\\nname = "s"\\nkind = "scans"\\npath = "x"\\n')
        try:
            parse_recipe(text, Path("recipe.toml"))
            print(json.dumps({"error": None}))
        except RecipeError as exc:
            print(json.dumps({"error": str(exc)}))
    """, plugin, cwd=tmp_path)
    assert out["error"] is not None
    assert 'sources[1] ("s").kind: source kind \'scans\' is built into collector' in out["error"]
    assert "package 'toy-kind' (entry point scans = toy_kind:KIND" in out["error"]


def test_a_plugin_that_fails_to_import_is_named_only_when_used(tmp_path: Path) -> None:
    """An entry point whose module cannot be imported does not disturb recipes that do not use
    it; a recipe that does gets a problem naming the package, the entry point and the cause,
    not a traceback."""
    plugin = write_plugin(tmp_path / "site", "brokenkind = no_such_module:KIND")
    out = run_python("""
        import json
        from pathlib import Path
        from collector.errors import RecipeError
        from collector.config.recipe import parse_recipe
        head = 'contact = "me@example.org"\\n[[sources]]\\nname = "s"\\n'
        found = {}
        for kind in ("scans", "brokenkind"):
            try:
                parse_recipe(head + f'kind = "{kind}"\\npath = "x"\\n', Path("recipe.toml"))
                found[kind] = None
            except RecipeError as exc:
                found[kind] = str(exc)
        print(json.dumps(found))
    """, plugin, cwd=tmp_path)
    assert out["scans"] is None
    error = out["brokenkind"]
    assert 'sources[1] ("s").kind: source kind \'brokenkind\' could not be loaded' in error
    assert "package 'toy-kind' (entry point brokenkind = no_such_module:KIND" in error
    assert "ModuleNotFoundError" in error and "Traceback" not in error


def test_a_plugin_object_must_be_a_source_kind_of_its_own_name(tmp_path: Path) -> None:
    """An entry point naming something that is not a SourceKind, or a kind of another name, is
    refused with what to fix."""
    plugin = write_plugin(tmp_path / "site",
                          "notakind = toy_kind:list_candidates\nothername = toy_kind:KIND")
    out = run_python("""
        import json
        from collector import sources
        from collector.errors import SourceKindError
        found = {}
        for kind in ("notakind", "othername"):
            try:
                sources.get_kind(kind)
            except SourceKindError as exc:
                found[kind] = str(exc)
        print(json.dumps(found))
    """, plugin, cwd=tmp_path)
    assert "not a sources.SourceKind" in out["notakind"]
    assert "calls itself 'toykind'" in out["othername"]


def test_a_json_api_recipe_does_not_import_scipy(tmp_path: Path) -> None:
    """Loading a recipe with a json_api source, and the run and export modules, leaves scipy
    unimported (only splitting a scan needs it)."""
    out = run_python("""
        import json, sys
        from pathlib import Path
        import collector.run.gather, collector.exports.datasheet, collector.exports.summary
        from collector.config.recipe import parse_recipe
        from collector import sources
        recipe = parse_recipe('''contact = "me@example.org"
        [[sources]]
        name = "api"
        kind = "json_api"
        url = "http://127.0.0.1:9/api"
        fields = { items = "results", id = "id", image_url = "url" }
        ''', Path("recipe.toml"))
        sources.get_kind("scans")
        print(json.dumps({"scipy": sorted(m for m in sys.modules if m.split(".")[0] == "scipy"),
                          "sources": len(recipe.sources)}))
    """, cwd=tmp_path)
    assert out == {"scipy": [], "sources": 1}


def test_every_built_in_kind_is_a_module_exporting_kind() -> None:
    """Each built-in kind is the KIND of its own module, named as its recipes name it."""
    names = sources.builtin_kind_names()
    assert {"json_api", "html", "scans"} <= set(names)
    for name in names:
        kind = sources.get_kind(name)
        assert isinstance(kind, SourceKind) and kind.name == name
        assert kind.mechanism and kind.collection_type


def test_an_unknown_kind_lists_the_known_ones() -> None:
    """Asking for a kind nobody provides names every known kind and the closest."""
    with pytest.raises(SourceKindError, match=r"must be one of .*'json_api'.*did you mean"):
        sources.get_kind("json-api")


def _kind_literals(path: Path, names: set[str]) -> list[str]:
    """Built-in kind names written as string literals in one module, except path segments
    (``folder / "scans"`` names a folder, not a kind)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    segments = {id(node.right) for node in ast.walk(tree)
                if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Div)}
    return [f"{path.name}:{node.lineno}: {node.value!r}" for node in ast.walk(tree)
            if isinstance(node, ast.Constant) and node.value in names
            and id(node) not in segments]


def test_no_module_outside_sources_names_a_kind() -> None:
    """collector/ never spells a built-in kind name: it asks the kind object (SourceKind), so
    adding a kind is one module in sources/ (or another package)."""
    names = set(sources.builtin_kind_names())
    found = [hit for path in sorted((REPO / "collector").rglob("*.py"))
             for hit in _kind_literals(path, names)]
    assert found == []


def test_the_kind_name_check_catches_a_literal(tmp_path: Path) -> None:
    """The check above finds a kind name used as a value, and lets a path segment pass."""
    module = tmp_path / "m.py"
    module.write_text('from pathlib import Path\nA = Path("x") / "scans"\n'
                      'B = {"html": 1}\nC = kind == "json_api"\n', encoding="utf-8")
    assert _kind_literals(module, {"json_api", "html", "scans"}) == [
        "m.py:3: 'html'", "m.py:4: 'json_api'"]


def test_sources_and_recipe_import_without_a_circle(tmp_path: Path) -> None:
    """sources/ imports neither collector.config.recipe nor an HTTP library, and
    collector.config.recipe does not import sources until a recipe with sources is checked."""
    for path in sorted((REPO / "sources").glob("*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        imported = {alias.name for node in ast.walk(tree) if isinstance(node, ast.Import)
                    for alias in node.names}
        imported |= {node.module or "" for node in ast.walk(tree)
                     if isinstance(node, ast.ImportFrom)}
        forbidden = {"collector.config.recipe", "requests", "urllib.request", "http.client"}
        assert not imported & forbidden, path.name
    out = run_python("""
        import json, sys
        import collector.config.recipe
        before = "collector.sources" in sys.modules
        from collector import sources
        print(json.dumps({"before": before, "kinds": sources.builtin_kind_names()}))
    """, cwd=tmp_path)
    assert out == {"before": False, "kinds": ["html", "iiif", "json_api", "oai_pmh", "scans"]}
