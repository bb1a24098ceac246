"""Recipe validation: every problem names the file, the key path and what is expected."""

from __future__ import annotations

from dataclasses import FrozenInstanceError, replace
from pathlib import Path

import pytest
from typer.testing import CliRunner

from collector.cli import app
from collector.config.recipe import DEFAULT_LICENCES, parse_recipe
from collector.config.stop_times import parse_duration
from collector.errors import RecipeError
from collector.storage.collection import init_collection, recipe_template

GOOD = 'contact = "curator@example.org"\n'


def problems_of(text: str) -> list[str]:
    """Validate text and return the problem strings (empty if valid)."""
    try:
        parse_recipe(text, Path("recipe.toml"))
    except RecipeError as exc:
        return [str(p) for p in exc.problems]
    return []


def test_minimal_recipe_fills_every_default() -> None:
    """A recipe with only a contact is valid and gets the documented defaults."""
    recipe = parse_recipe(GOOD, Path("recipe.toml"))
    assert recipe.contact == "curator@example.org"
    assert recipe.product_token == "collector"
    assert recipe.budgets.max_connections == 1
    assert recipe.licences.allow == DEFAULT_LICENCES
    assert recipe.images.max_pixels == 89_478_485  # Pillow's MAX_IMAGE_PIXELS default
    assert recipe.sources == []


def test_template_written_by_init_is_valid_once_contact_is_set() -> None:
    """The commented template validates when a contact is given."""
    recipe = parse_recipe(recipe_template(contact="me@example.org", name='My "leaves"'),
                          Path("recipe.toml"))
    assert recipe.collection.name == 'My "leaves"'


MALFORMED = [
    ("syntax error", GOOD + "budgets = [\n", "recipe.toml: not valid TOML: "),
    ("missing contact", "", "recipe.toml: contact: is required: an email address"),
    ("empty contact", 'contact = ""\n', "recipe.toml: contact: is required"),
    ("contact not an address", 'contact = "call me"\n',
     "recipe.toml: contact: must be an email address or an http(s) URL, got 'call me'"),
    ("contact wrong type", "contact = 5\n",
     "recipe.toml: contact: must be a string, got a whole number (5)"),
    ("unknown top key", GOOD + 'contcat = "x"\n',
     "recipe.toml: contcat: unknown key (did you mean 'contact'?)"),
    ("unknown section key", GOOD + "[budgets]\nmin_intervall = 2\n",
     "recipe.toml: budgets.min_intervall: unknown key (did you mean 'min_interval'?)"),
    ("negative budget", GOOD + "[budgets]\nrequests_per_hour = -5\n",
     "recipe.toml: budgets.requests_per_hour: must be greater than 0, got -5"),
    ("negative interval", GOOD + "[budgets]\nmin_interval = -1.0\n",
     "recipe.toml: budgets.min_interval: must be 0 or more, got -1.0"),
    ("wrong type string for number", GOOD + '[budgets]\nmax_connections = "two"\n',
     "recipe.toml: budgets.max_connections: must be a whole number, got a string ('two')"),
    ("boolean is not a number", GOOD + "[network]\nread_timeout = true\n",
     "recipe.toml: network.read_timeout: must be a number, got a boolean (True)"),
    ("section not a table", GOOD + 'images = "big"\n',
     "recipe.toml: images: must be a table ([images]), got a string ('big')"),
    ("bad product token", GOOD + 'product_token = "collector/1.0"\n',
     "recipe.toml: product_token: must contain only letters, '_' and '-' (RFC 9309"),
    ("bad allow address", GOOD + '[network]\nallow_addresses = ["localhost:80"]\n',
     "recipe.toml: network.allow_addresses: entries must be IP addresses or CIDR ranges"),
    ("bad licence id", GOOD + '[licences]\nallow = ["CC BY 4.0"]\n',
     "recipe.toml: licences.allow: entries must be SPDX licence ids"),
    ("bad near policy", GOOD + '[images]\nnear_duplicates = "delete"\n',
     "recipe.toml: images.near_duplicates: must be one of 'keep', 'drop', got 'delete'"),
    ("bad stop time", GOOD + '[stop]\nuntil = "7am"\n',
     "recipe.toml: stop.until: must be a local time like \"07:00\""),
    ("bad duration", GOOD + '[stop]\nduration = "8 hours"\n',
     "recipe.toml: stop.duration: must be a duration like \"8h\""),
    ("aspect bounds crossed", GOOD + "[images]\nmin_aspect = 2.0\nmax_aspect = 1.0\n",
     "recipe.toml: images.max_aspect: must be greater than images.min_aspect"),
    ("host override unknown key", GOOD + '[budgets.hosts."a.example.org"]\nspeed = 3\n',
     'recipe.toml: budgets.hosts."a.example.org".speed: unknown key'),
    ("sources not an array", GOOD + '[sources]\nname = "x"\n',
     "recipe.toml: sources: must be an array of tables written as [[sources]]"),
    ("source without name", GOOD + '[[sources]]\nkind = "html"\n',
     "recipe.toml: sources[1].name: is required"),
    ("source kind unknown", GOOD + '[[sources]]\nname = "a"\nkind = "jsonapi"\n',
     "recipe.toml: sources[1] (\"a\").kind: must be one of 'html', 'iiif', 'json_api', "
     "'oai_pmh', 'scans', got 'jsonapi' (did you mean 'json_api'?)"),
    ("duplicate source names", GOOD + '[[sources]]\nname = "a"\nkind = "scans"\npath = "s"\n'
     '[[sources]]\nname = "a"\nkind = "scans"\npath = "s"\n',
     "recipe.toml: sources[2] (\"a\").name: 'a' is used by an earlier source"),
]


@pytest.mark.parametrize(("text", "expected"), [(t, e) for _, t, e in MALFORMED],
                         ids=[name for name, _, _ in MALFORMED])
def test_malformed_recipe_gives_its_specific_message(text: str, expected: str) -> None:
    """Each kind of mistake produces a message naming the file, key path and expectation."""
    found = problems_of(text)
    assert any(p.startswith(expected) for p in found), found


def test_all_problems_are_reported_at_once() -> None:
    """Three independent mistakes give three problems in one error, not one per run."""
    text = 'contact = "x"\n[budgets]\nmin_interval = -1\n[images]\nmin_sid = 3\n'
    found = problems_of(text)
    assert len(found) == 3, found


def test_durations_parse_to_seconds() -> None:
    """Durations combine hours, minutes and seconds."""
    assert parse_duration("8h") == 8 * 3600
    assert parse_duration("1h30m") == 5400
    assert parse_duration("45s") == 45
    with pytest.raises(ValueError):
        parse_duration("0m")


def test_host_budget_override_merges_over_defaults() -> None:
    """A per-host override changes only the keys it names, by host or host:port."""
    text = GOOD + ('[budgets]\nmin_interval = 3.0\n[budgets.hosts."a.example.org"]\n'
                   'min_interval = 10.0\n'
                   '[budgets.hosts."a.example.org:8080"]\nmax_connections = 2\n')
    recipe = parse_recipe(text, Path("recipe.toml"))
    assert recipe.budget_for("a.example.org").min_interval == 10.0
    assert recipe.budget_for("a.example.org:8080") == replace(
        recipe.budgets, min_interval=10.0, max_connections=2)
    assert recipe.budget_for("b.example.org").min_interval == 3.0


@pytest.mark.parametrize(("text", "expected"), [(t, e) for _, t, e in MALFORMED[:14]],
                         ids=[name for name, _, _ in MALFORMED[:14]])
def test_check_command_prints_problem_exits_2_without_traceback(
        tmp_path: Path, text: str, expected: str) -> None:
    """`collector check` on a broken recipe exits 2 with 'Error:' and no traceback."""
    init_collection(tmp_path / "c", contact="me@example.org")
    (tmp_path / "c" / "recipe.toml").write_text(text)
    result = CliRunner().invoke(app, ["check", str(tmp_path / "c")])
    assert result.exit_code == 2
    assert result.stderr.startswith("Error: the recipe has")
    assert expected.split(": ", 1)[1] in result.stderr
    assert "Traceback" not in result.output + result.stderr


def test_recipe_that_is_not_utf8_is_a_recipe_error(tmp_path: Path) -> None:
    """A binary recipe file gives a clear recipe error, exit 2."""
    init_collection(tmp_path / "c", contact="me@example.org")
    (tmp_path / "c" / "recipe.toml").write_bytes(b"\xff\xfe\x00bad")
    result = CliRunner().invoke(app, ["check", str(tmp_path / "c")])
    assert result.exit_code == 2
    assert "not UTF-8 text" in result.stderr


def test_sections_are_frozen_typed_objects() -> None:
    """Each recipe section is a frozen dataclass: values land on attributes, which cannot be
    changed afterwards."""
    text = GOOD + '[images]\nmin_side = 64\nnear_duplicates = "drop"\n[stop]\nmax_items = 5\n'
    recipe = parse_recipe(text, Path("recipe.toml"))
    assert (recipe.images.min_side, recipe.images.near_duplicates) == (64, "drop")
    assert recipe.stop.max_items == 5 and recipe.stop.until == ""
    assert recipe.as_dict()["images"]["min_side"] == 64
    with pytest.raises(FrozenInstanceError):
        recipe.images.min_side = 1  # type: ignore[misc]


def test_a_utf8_byte_order_mark_is_accepted() -> None:
    """A BOM written by a Windows editor (U+FEFF, Unicode §23.8) is not a TOML error."""
    assert problems_of("\ufeff" + GOOD) == []


def test_a_deeply_nested_recipe_is_a_clear_error() -> None:
    """3,000 nested arrays end in one problem saying so, not a RecursionError."""
    text = GOOD + "x = " + "[" * 3000 + "]" * 3000 + "\n"
    found = problems_of(text)
    assert len(found) == 1 and "nested too deeply" in found[0]
    assert "nested too deeply" in problems_of(GOOD + "x = " + "[" * 40 + "]" * 40 + "\n")[0]


@pytest.mark.parametrize("value", ["Bearer abc\\r\\nX-Evil: 1", "abc\\n", "a\\u0000b"])
def test_header_values_with_cr_lf_or_nul_are_refused(value: str) -> None:
    """CR, LF or NUL in a header value is refused with its key path (RFC 9110 §5.5), in
    [network] headers and in a source's headers."""
    net = problems_of(GOOD + f'[network]\nheaders = {{ Authorization = "{value}" }}\n')
    assert len(net) == 1 and "network.headers" in net[0] and "RFC 9110" in net[0]
    src = problems_of(GOOD + '[[sources]]\nname = "a"\nkind = "json_api"\n'
                      'url = "https://api.example.org/x"\n'
                      f'headers = {{ X-Api-Key = "{value}" }}\n'
                      '[sources.fields]\nitems = "items"\nid = "id"\nimage_url = "img"\n')
    assert any('sources[1] ("a").headers.X-Api-Key' in p and "RFC 9110" in p for p in src), src


def test_contact_with_a_line_break_is_refused() -> None:
    """The contact goes into the User-Agent: a CR/LF in it would split the header."""
    found = problems_of('contact = "https://example.org/me\\r\\nX-Evil: 1"\n')
    assert len(found) == 1 and "contact" in found[0] and "control characters" in found[0]


def test_check_refuses_a_header_whose_variable_ends_in_cr(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A token read from a file with Windows line endings: `check` exits 2 naming the key
    path, and never prints the token."""
    col = init_collection(tmp_path / "c", contact="me@example.org")
    col.recipe_path.write_text(col.recipe_path.read_text().replace(
        "[network]\n", '[network]\nheaders = { Authorization = "Bearer ${CR_TOKEN}" }\n', 1))
    monkeypatch.setenv("CR_TOKEN", "t0ken-secret-42\r")
    result = CliRunner().invoke(app, ["check", str(col.root)])
    assert result.exit_code == 2, result.output
    assert "network.headers.Authorization" in result.output
    assert "carriage return" in result.output
    assert "t0ken-secret-42" not in result.output
    monkeypatch.setenv("CR_TOKEN", "t0ken-secret-42")
    assert CliRunner().invoke(app, ["check", str(col.root)]).exit_code == 0


def test_check_hides_secrets_written_into_the_recipe() -> None:
    """Secret header values (names compared case-insensitively, e.g. "authorization") and
    secret params written as literals are shown as REDACTED by `check`; ${NAME} references and
    ordinary values are shown as they are."""
    from collector.urls import REDACTED

    recipe = parse_recipe(GOOD + (
        '[network]\nheaders = { authorization = "Bearer lit3ral-t0ken", Accept = "*/*" }\n'
        '[[sources]]\nname = "a"\nkind = "json_api"\nurl = "https://api.example.org/x"\n'
        'params = { api_key = "lit3ral-k3y", other = "${OTHER}", per_page = "10" }\n'
        'secret_params = ["api_key", "other"]\n'
        'headers = { X-Api-Key = "${MY_KEY}" }\n'
        '[sources.fields]\nitems = "items"\nid = "id"\nimage_url = "img"\n'), Path("r.toml"))
    shown = recipe.shown_settings()
    assert shown["network"]["headers"] == {"authorization": REDACTED, "Accept": "*/*"}
    assert shown["sources"][0]["params"] == {"api_key": REDACTED, "other": "${OTHER}",
                                             "per_page": "10"}
    assert shown["sources"][0]["headers"] == {"X-Api-Key": "${MY_KEY}"}
    assert "lit3ral" not in str(shown)
    assert recipe.network.headers["authorization"] == "Bearer lit3ral-t0ken"  # kept for use
