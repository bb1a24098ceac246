"""Secrets stay secret whatever a server does: an API key in a param marked secret, an
Authorization header and a Cookie never appear in the ledger file (and its -wal), the
--log-json output, the datasheet export or any error message, even when the server sends
them back in redirects, error pages and links."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from collector.collection import init_collection
from demo_site.hostile import Ctx, case_server, noise_image
from demo_site.hostile_run import run_gather
from demo_site.loopback import LoopbackServer, send

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
