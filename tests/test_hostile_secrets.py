"""Secrets stay secret whatever a server does: an API key in a param marked secret, an
Authorization header and a Cookie never appear in the ledger file (and its -wal), the
--log-json output, the datasheet export or any error message, even when the server sends
them back in redirects, error pages and links."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from collector.demo_site.hostile import Ctx, case_server, noise_image
from collector.demo_site.hostile_run import run_gather
from collector.demo_site.loopback import LoopbackServer, send
from collector.storage.collection import init_collection

KEY = "k3y-Sup3rSecret-4711"
TOKEN = "t0ken-AlsoSecret-0815"
COOKIE = "c00kie-Secret-2342"
SECRETS = [KEY, TOKEN, COOKIE]
ENV = {"HOSTILE_KEY": KEY, "HOSTILE_TOKEN": TOKEN, "HOSTILE_COOKIE": COOKIE}


def leaky_site() -> LoopbackServer:
    """An API that echoes the caller's key in redirects, error texts and (same-named) params."""
    def api(h, ctx: Ctx) -> None:
        base = ctx.sites["leaky"]
        items = [
            {"id": "plain", "image": f"{base}/img/plain.png", "licence": "CC0-1.0"},
            {"id": "redirected", "image": f"{base}/bounce.png?key={KEY}", "licence": "CC0-1.0"},
            {"id": "error", "image": f"{base}/broken.png?key={KEY}", "licence": "CC0-1.0"},
        ]
        send(h, 200, json.dumps({"items": items}).encode(), {"Content-Type": "application/json"})

    def bounce(h, ctx: Ctx) -> None:
        send(h, 302, headers={"Location": f"/img/bounced.png?key={KEY}&x=1"})

    def broken(h, ctx: Ctx) -> None:
        send(h, 500, f"error: bad key {KEY} for {TOKEN}".encode(),
             {"X-Debug": f"Authorization: Bearer {TOKEN}"})

    def image(h, ctx: Ctx) -> None:
        send(h, 200, noise_image(h.path.split("?")[0]), {"Content-Type": "image/png",
                                                         "Set-Cookie": f"s={COOKIE}"})

    sites: dict[str, str] = {"outside": "/nonexistent"}
    site = case_server(Ctx("leaky", sites), routes={"/api": api, "/bounce": bounce,
                                             "/broken": broken, "/img": image})
    sites["leaky"] = site.base
    return site


RECIPE = """contact = "x@example.org"
[budgets]
min_interval = 0.0
max_attempts = 2
backoff_base = 0.05
backoff_max = 0.1
[network]
allow_addresses = ["127.0.0.1"]
[[sources]]
name = "leaky"
kind = "json_api"
url = "{base}/api/items"
params = {{ key = "${{HOSTILE_KEY}}" }}
secret_params = ["key"]
headers = {{ Authorization = "Bearer ${{HOSTILE_TOKEN}}", Cookie = "session=${{HOSTILE_COOKIE}}" }}
[sources.fields]
items = "items"
id = "id"
image_url = "image"
licence = "licence"
"""


NETWORK_LEVEL = RECIPE.replace('secret_params = ["key"]\n', "").replace(
    "[network]\n", '[network]\nsecret_params = ["key"]\n')


@pytest.mark.parametrize("recipe", [RECIPE, NETWORK_LEVEL], ids=["source-level",
                                                                 "network-level"])
def test_secrets_never_reach_the_ledger_logs_exports_or_messages(
        tmp_path: Path, recipe: str) -> None:
    """Ledger bytes (+ -wal), --log-json stdout, stderr and every datasheet file are free
    of the key, the bearer token and the cookie, while the run did use them, whether the
    key is marked secret in the source or in [network]."""
    site = leaky_site()
    try:
        col = init_collection(tmp_path / "col", contact="x@example.org")
        col.recipe_path.write_text(recipe.format(base=site.base))
        stats = run_gather(col.root, "--log-json", env=ENV)
        hits = site.targets()
    finally:
        site.close()
    assert any(f"key={KEY}" in h for h in hits)  # the key was really sent
    assert stats.returncode == 0, stats.stderr
    from typer.testing import CliRunner

    from collector.cli import app

    export = CliRunner().invoke(app, ["datasheet", str(col.root), "--out",
                                      str(tmp_path / "sheet")])
    assert export.exit_code == 0, export.output
    places: dict[str, bytes] = {
        "stdout": stats.stdout.encode(), "stderr": stats.stderr.encode(),
        "datasheet output": export.output.encode()}
    for path in [*col.root.glob("ledger.sqlite*"), *(tmp_path / "sheet").rglob("*")]:
        if path.is_file():
            places[str(path)] = path.read_bytes()
    assert any("ledger.sqlite" in p for p in places)
    leaks = [(where, s) for where, data in places.items() for s in SECRETS
             if s.encode() in data]
    assert leaks == []


def test_a_token_with_a_trailing_cr_is_redacted_in_every_form(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A bearer token read from a file with Windows line endings ("...\\r") makes the HTTP
    library refuse the header; its error text (which shows the value escaped, "\\\\r")
    reaches the ledger without the token in any form: raw, stripped or escaped."""
    from collector.errors import FetchError
    from collector.fetching.fetcher import Fetcher, FetchSettings
    from collector.storage.ledger import Ledger

    site = leaky_site()
    monkeypatch.setenv("CR_TOKEN", TOKEN + "\r")
    recipe = {"contact": "x@example.org",
              "budgets": {"min_interval": 0.0, "max_attempts": 1},
              "network": {"allow_addresses": ["127.0.0.1"],
                          "headers": {"Authorization": "Bearer ${CR_TOKEN}"}}}
    ledger = Ledger.create(tmp_path / "ledger.sqlite")
    fetcher = Fetcher(FetchSettings.from_recipe(recipe), ledger)
    try:
        with pytest.raises(FetchError) as caught:
            fetcher.get_page(site.base + "/api/items")
    finally:
        fetcher.close()
        ledger.close()
        site.close()
    errors = [r["error"] for r in Ledger.open(tmp_path / "ledger.sqlite").query(
        "SELECT error FROM fetches WHERE error IS NOT NULL")]
    assert errors  # the refusal was recorded
    data = b"".join(p.read_bytes() for p in tmp_path.glob("ledger.sqlite*"))
    for form in (TOKEN, TOKEN + "\\r", repr(TOKEN + "\r")[1:-1]):
        assert form.encode() not in data
        assert form not in str(caught.value)


def test_an_api_key_header_is_secret_by_its_name(tmp_path: Path) -> None:
    """X-Api-Key is not listed in secret_headers, yet a server echoing its value into item
    titles does not get it into the ledger: header names holding key, token, secret, auth,
    cookie, session or password are secret by default."""
    def api(h, ctx: Ctx) -> None:
        echoed = h.headers.get("X-Api-Key", "")
        items = [{"id": "a", "title": f"for {echoed}", "image": f"{ctx.sites['keyed']}/img/a.png",
                  "licence": "CC0-1.0"}]
        send(h, 200, json.dumps({"items": items}).encode(), {"Content-Type": "application/json"})

    def image(h, ctx: Ctx) -> None:
        send(h, 200, noise_image("keyed"), {"Content-Type": "image/png"})

    sites: dict[str, str] = {"outside": "/nonexistent"}
    site = case_server(Ctx("keyed", sites), routes={"/api": api, "/img": image})
    sites["keyed"] = site.base
    recipe = (RECIPE.format(base=site.base)
              .replace('params = { key = "${HOSTILE_KEY}" }\nsecret_params = ["key"]\n', "")
              .replace('headers = { Authorization = "Bearer ${HOSTILE_TOKEN}", '
                       'Cookie = "session=${HOSTILE_COOKIE}" }',
                       'headers = { X-Api-Key = "${HOSTILE_KEY}" }')
              .replace('image_url = "image"', 'image_url = "image"\ntitle = "title"'))
    assert "X-Api-Key" in recipe and "HOSTILE_TOKEN" not in recipe
    try:
        col = init_collection(tmp_path / "col", contact="x@example.org")
        col.recipe_path.write_text(recipe)
        stats = run_gather(col.root, "--quiet", env=ENV)
    finally:
        site.close()
    assert stats.returncode == 0, stats.stderr
    with col.ledger(readonly=True) as ledger:
        titles = [r["title"] for r in ledger.query("SELECT title FROM items")]
    assert titles == ["for REDACTED"]
    data = b"".join(p.read_bytes() for p in col.root.glob("ledger.sqlite*"))
    assert KEY.encode() not in data
