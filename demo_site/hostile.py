"""A hostile archive on loopback, and the table of its misbehaviours.

Every :class:`Case` gets its own HTTP server on ``127.0.0.1`` (its own port, so its own host
key, robots.txt, budget and circuit breaker: one case cannot park or throttle another). A
*lister* site serves a JSON API whose items point at the image cases, plus a normal item that
must still be stored. Listing cases are sources of their own. Two helper sites exist: the
*fence* (127.0.0.1, robots.txt disallows ``/private/``) and the *forbidden* site on
``127.0.0.9``, an address the recipe does not allow: it counts requests so that a test can
prove the guard kept every connection away from it. No request ever leaves loopback.

Used by ``tests/test_hostile.py`` and ``bench/hostile.py`` (one table for both); running a
gather over it and judging the ledger is ``demo_site.hostile_run``. Servers are
``demo_site.loopback.LoopbackServer``.
"""

from __future__ import annotations

import io
import json
import random
import select
import socket
import struct
import time
import zlib
from collections.abc import Callable
from dataclasses import dataclass
from functools import cache
from http.server import BaseHTTPRequestHandler
from pathlib import Path
from typing import Any

from PIL import Image

from collector.demo_site import hostile_iiif
from collector.demo_site.loopback import LoopbackServer, send

FORBIDDEN_HOST = "127.0.0.9"  # loopback, but not in the recipe's allow_addresses
H = BaseHTTPRequestHandler


# --- images --------------------------------------------------------------------------------
@cache
def noise_image(seed: str, fmt: str = "PNG", size: int = 64, **save: Any) -> bytes:
    """A small random-noise picture; distinct seeds give unrelated perceptual hashes."""
    rng = random.Random(seed)
    im = Image.frombytes("RGB", (size, size), rng.randbytes(size * size * 3))
    out = io.BytesIO()
    im.save(out, fmt, **save)
    return out.getvalue()


def _chunk(kind: bytes, data: bytes) -> bytes:
    # PNG chunk layout and CRC-32 over type+data: PNG specification (ISO/IEC 15948) §5.3.
    return struct.pack(">I", len(data)) + kind + data + struct.pack(
        ">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


@cache
def png_bomb(side: int = 20000) -> bytes:
    """A real PNG decompression bomb: a ``side``² 1-bit image of zeros, ~50 KB on the wire,
    400 megapixels when decoded (Pillow refuses it at open, libraries.md §7)."""
    comp = zlib.compressobj(9)
    row = b"\x00" * (1 + (side + 7) // 8)  # filter byte + packed bits (PNG spec §7.2)
    data = b"".join(comp.compress(row) for _ in range(side)) + comp.flush()
    ihdr = struct.pack(">IIBBBBB", side, side, 1, 0, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + _chunk(b"IHDR", ihdr) + _chunk(b"IDAT", data)
            + _chunk(b"IEND", b""))


@cache
def gif_bomb() -> bytes:
    """A GIF whose screen and frame claim 65535x65535 pixels (4.3 gigapixels) in 40 bytes
    (GIF89a specification §18 logical screen, §20 image descriptor)."""
    return (b"GIF89a" + struct.pack("<HHBBB", 65535, 65535, 0x80, 0, 0)
            + b"\x00\x00\x00\xff\xff\xff"  # 2-colour global colour table
            + b"\x2c" + struct.pack("<HHHHB", 0, 0, 65535, 65535, 0)
            + b"\x02\x02\x44\x01\x00" + b"\x3b")


def png_bad_crc(seed: str) -> bytes:
    """A PNG with one byte of its IDAT data flipped, so its CRC no longer matches."""
    data = bytearray(noise_image(seed))
    at = data.index(b"IDAT") + 4 + 20
    data[at] ^= 0xFF
    return bytes(data)


def jpeg_with_trailer(seed: str) -> bytes:
    """A whole JPEG followed by 64 KiB of random bytes after its EOI marker."""
    return noise_image(seed, "JPEG", quality=90) + random.Random(seed).randbytes(65536)


def png_huge_exif(seed: str, size: int = 900_000) -> bytes:
    """A PNG whose eXIf chunk holds an ImageDescription of ``size`` bytes."""
    exif = Image.Exif()
    exif[0x010E] = "A" * size  # ImageDescription (Exif 2.32 §4.6.5)
    exif[0x013B] = "Ann Example"  # Artist
    rng = random.Random(seed)
    im = Image.frombytes("RGB", (64, 64), rng.randbytes(64 * 64 * 3))
    out = io.BytesIO()
    im.save(out, "PNG", exif=exif.tobytes())
    return out.getvalue()


def _entities() -> bytes:
    lines = [b'<!ENTITY l0 "lol">']
    for n in range(1, 10):
        lines.append(b'<!ENTITY l%d "%s">' % (n, b"".join(b"&l%d;" % (n - 1) for _ in range(10))))
    return b"\n".join(lines)


# Ten levels of ten references each: 10^9 copies of "lol" if a parser expanded them.
XMP_BOMB = (b"<?xpacket begin='' id='W5M0MpCehiHzreSzNTczkc9d'?>\n<!DOCTYPE lolz [\n"
            + _entities() + b"]>\n<x:xmpmeta xmlns:x='adobe:ns:meta/'><rdf:RDF "
            b"xmlns:rdf='http://www.w3.org/1999/02/22-rdf-syntax-ns#'><rdf:Description "
            b"xmlns:dc='http://purl.org/dc/elements/1.1/'><dc:rights>&l9;</dc:rights>"
            b"</rdf:Description></rdf:RDF></x:xmpmeta><?xpacket end='w'?>")


def jpeg_xmp_bomb(seed: str) -> bytes:
    """A JPEG carrying an XMP packet with a billion-laughs entity expansion."""
    return noise_image(seed, "JPEG", xmp=XMP_BOMB)


# --- response helpers ----------------------------------------------------------------------
def hold_until_client_leaves(h: H, limit: float = 30.0) -> None:
    """Send nothing more; return when the client closes the connection (or after limit s)."""
    h.close_connection = True
    end = time.monotonic() + limit
    sock = h.connection
    while time.monotonic() < end:
        ready, _, _ = select.select([sock], [], [], 0.2)
        if ready:
            try:
                if not sock.recv(4096):
                    return
            except OSError:
                return


def redirect(to: str) -> Callable[[H, Ctx], None]:
    """A handler answering 302 with a fixed Location (a template over the context)."""
    def handle(h: H, ctx: Ctx) -> None:
        send(h, 302, headers={"Location": ctx.fill(to)})
    return handle


def serve(body: bytes | Callable[[str], bytes], ctype: str = "image/png",
          **headers: str) -> Callable[[H, Ctx], None]:
    """A handler answering 200 with a fixed body (or one made from the case name)."""
    def handle(h: H, ctx: Ctx) -> None:
        data = body(ctx.name) if callable(body) else body
        send(h, 200, data, {"Content-Type": ctype, **{k.replace("_", "-"): v
                                                       for k, v in headers.items()}})
    return handle


def truncated_honest(h: H, ctx: Ctx) -> None:
    """Content-Length of the whole image, half of it sent, then the connection closed."""
    data = noise_image(ctx.name)
    send(h, 200, data[: len(data) // 2], {"Content-Type": "image/png"}, length=len(data))
    h.close_connection = True


def truncated_lying(h: H, ctx: Ctx) -> None:
    """A Content-Length that matches half the image: the HTTP body is 'whole', the PNG not."""
    data = noise_image(ctx.name)
    send(h, 200, data[: len(data) // 2], {"Content-Type": "image/png"})


def endless(h: H, ctx: Ctx) -> None:
    """No Content-Length, bytes forever (until the client hangs up)."""
    h.send_response(200)
    h.send_header("Content-Type", "image/png")
    h.send_header("Connection", "close")
    h.end_headers()
    h.close_connection = True
    block = b"\x89PNG\r\n\x1a\n" + b"\x00" * 65528
    try:
        for _ in range(100_000):  # 6.5 GB at most
            h.wfile.write(block)
    except OSError:
        return


def over_cap(h: H, ctx: Ctx) -> None:
    """Content-Length of 10 GB, a few bytes, then silence."""
    send(h, 200, b"\x89PNG\r\n\x1a\n", {"Content-Type": "image/png"}, length=10_000_000_000)
    hold_until_client_leaves(h)


def slow_drip(h: H, ctx: Ctx) -> None:
    """A whole image announced, then one byte per second."""
    data = noise_image(ctx.name)
    h.send_response(200)
    h.send_header("Content-Type", "image/png")
    h.send_header("Content-Length", str(len(data)))
    h.end_headers()
    h.close_connection = True
    try:
        for i in range(len(data)):
            h.wfile.write(data[i:i + 1])
            h.wfile.flush()
            time.sleep(ctx.drip_interval)
    except OSError:
        return


def stalled(h: H, ctx: Ctx) -> None:
    """Headers, then nothing at all."""
    h.send_response(200)
    h.send_header("Content-Type", "image/png")
    h.send_header("Content-Length", "5000")
    h.end_headers()
    h.wfile.flush()
    hold_until_client_leaves(h)


def reset_mid_body(h: H, ctx: Ctx) -> None:
    """Half the body, then a TCP reset (SO_LINGER 0 makes close() send RST)."""
    data = noise_image(ctx.name)
    h.send_response(200)
    h.send_header("Content-Type", "image/png")
    h.send_header("Content-Length", str(len(data)))
    h.end_headers()
    h.wfile.write(data[: len(data) // 2])
    h.wfile.flush()
    h.connection.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
    h.close_connection = True
    h.connection.close()


def hops(h: H, ctx: Ctx) -> None:
    """/hop/N redirects to /hop/N-1; /hop/0 is the image."""
    n = int(h.path.rsplit("/", 1)[1].split(".")[0])
    if n == 0:
        send(h, 200, noise_image(ctx.name), {"Content-Type": "image/png"})
    else:
        send(h, 302, headers={"Location": f"/hop/{n - 1}.png"})


def status(code: int, retry_after: str | None) -> Callable[[H, Ctx], None]:
    """Always the same error status, with an optional Retry-After."""
    def handle(h: H, ctx: Ctx) -> None:
        send(h, code, b"busy", {"Retry-After": retry_after} if retry_after else None)
    return handle


def robots_redirect_loop(h: H, ctx: Ctx) -> None:
    """robots.txt redirects to itself forever."""
    send(h, 302, headers={"Location": "/robots.txt"})


def big_robots(h: H, ctx: Ctx) -> None:
    """A 5 MB robots.txt: one real group, then comment lines."""
    head = b"User-agent: *\nDisallow: /private/\n"
    pad = b"# padding line of a very long robots.txt file\n"
    body = head + pad * ((5_000_000 - len(head)) // len(pad))
    send(h, 200, body, {"Content-Type": "text/plain"})


def binary_robots(h: H, ctx: Ctx) -> None:
    """robots.txt made of random bytes."""
    send(h, 200, random.Random("robots").randbytes(8192),
         {"Content-Type": "application/octet-stream"})


# --- tdmrep.json (W3C TDM Reservation Protocol, see demo_site.tdm) -------------------------
def _tdmrep(body: bytes, ctype: str = "application/json") -> Callable[[H, Ctx], None]:
    def handle(h: H, ctx: Ctx) -> None:
        send(h, 200, body, {"Content-Type": ctype})
    return handle


RESERVE_ALL = b'{"location": "/", "tdm-reservation": 1}'
# 5 MB: a rule reserving everything, then padding rules; over the 512 KiB collector reads.
tdmrep_5mb = _tdmrep(b"[" + RESERVE_ALL + b"," + b",".join(
    [b'{"location": "/padding/of/a/very/long/file/", "tdm-reservation": 0}'] * 74_000) + b"]")
tdmrep_invalid = _tdmrep(b'[{"location": "/", "tdm-reservation": 1},, oops')
tdmrep_100k = _tdmrep(b"[" + b",".join([RESERVE_ALL] * 100_000) + b"]")


def tdmrep_redirect_loop(h: H, ctx: Ctx) -> None:
    """tdmrep.json redirects to itself forever."""
    send(h, 302, headers={"Location": "/.well-known/tdmrep.json"})


def tdmrep_down(h: H, ctx: Ctx) -> None:
    """tdmrep.json answers 503 every time."""
    send(h, 503, b"down", {"Content-Type": "text/plain"})


# --- listings ------------------------------------------------------------------------------
def deep_json(h: H, ctx: Ctx) -> None:
    """A JSON listing nested 100,000 arrays deep."""
    send(h, 200, b"[" * 100_000 + b"]" * 100_000, {"Content-Type": "application/json"})


def huge_json(h: H, ctx: Ctx) -> None:
    """A 50 MB JSON listing (streamed, honest Content-Length)."""
    item = b'{"id": "x", "image": "/nothing.png", "licence": "CC0-1.0"},'
    count = 50_000_000 // len(item)
    h.send_response(200)
    h.send_header("Content-Type", "application/json")
    h.send_header("Content-Length", str(len(b'{"items": [') + count * len(item) + 2))
    h.end_headers()
    h.close_connection = True
    try:
        h.wfile.write(b'{"items": [')
        for _ in range(count // 1000):
            h.wfile.write(item * 1000)
        h.wfile.write(item * (count % 1000) + b"]}")
    except OSError:
        return


def json_cycle(h: H, ctx: Ctx) -> None:
    """Two JSON pages whose next links point at each other."""
    page = "b" if h.path.startswith("/api/b") else "a"
    body = {"items": [{"id": f"{ctx.name}-{page}", "image": f"/good-{page}.png",
                       "licence": "CC0-1.0"}],
            "next": "/api/b" if page == "a" else "/api/a"}
    send(h, 200, json.dumps(body).encode(), {"Content-Type": "application/json"})


def json_lone_surrogates(h: H, ctx: Ctx) -> None:
    """A JSON listing whose strings hold lone surrogates, written as JSON escapes ("\\ud800"):
    valid JSON whose text no UTF can encode (RFC 8259 §8.2)."""
    body = {"items": [{"id": f"{ctx.name}-\ud800", "image": "/good-a.png",
                       "licence": "CC0-1.0", "caption": "fern \udfff frond",
                       "tags \udc00": ["\ud83d"]}]}
    send(h, 200, json.dumps(body).encode(), {"Content-Type": "application/json"})


def html_page(ctx: Ctx, extra: str = "", next_href: str | None = None,
              image: str = "/good.png") -> bytes:
    """A listing page with one item."""
    nxt = f'<a rel="next" href="{next_href}">next</a>' if next_href else ""
    return (f'<!doctype html><html><body><ul><li class="tile"><a href="/item/{image}">'
            f'<img src="{image}"></a><span class="licence">CC0-1.0</span>{extra}</li>'
            f"</ul>{nxt}</body></html>").encode()


def html_invalid_utf8(h: H, ctx: Ctx) -> None:
    """A listing labelled UTF-8 with invalid byte sequences in it."""
    body = html_page(ctx, "<p>caf\xe9 \xff\xfe \xc3\x28 \xed\xa0\x80</p>".encode("latin-1")
                     .decode("latin-1"))
    body = body.replace(b"caf\xc3\xa9", b"caf\xe9").replace(b"\xc3\xbf\xc3\xbe", b"\xff\xfe")
    send(h, 200, body, {"Content-Type": "text/html; charset=utf-8"})


def html_utf7_surrogate(h: H, ctx: Ctx) -> None:
    """A listing labelled UTF-7 whose licence text holds "+2AA-": UTF-7 (RFC 2152) encodes
    UTF-16 code units, so this decodes to the lone surrogate U+D800."""
    body = html_page(ctx).replace(b">CC0-1.0<", b">CC0-1.0 +2AA-<")
    send(h, 200, body, {"Content-Type": "text/html; charset=utf-7"})


def html_bogus_charset(h: H, ctx: Ctx) -> None:
    """A listing whose Content-Type names a charset that does not exist."""
    send(h, 200, html_page(ctx), {"Content-Type": "text/html; charset=x-no-such-charset"})


def html_wrong_charset(h: H, ctx: Ctx) -> None:
    """A UTF-8 listing labelled UTF-16: decoded as UTF-16 it is noise."""
    send(h, 200, html_page(ctx), {"Content-Type": "text/html; charset=utf-16"})


def html_cycle(h: H, ctx: Ctx) -> None:
    """Two HTML pages whose rel=next links point at each other."""
    page = "b" if h.path.startswith("/list/b") else "a"
    send(h, 200, html_page(ctx, next_href="/list/b" if page == "a" else "/list/a",
                           image=f"/good-{page}.png"), {"Content-Type": "text/html"})


OAI_NS = "http://www.openarchives.org/OAI/2.0/"


def _oai_envelope(inner: bytes, namespace: bool = True) -> bytes:
    xmlns = f' xmlns="{OAI_NS}"'.encode() if namespace else b""
    return (b'<?xml version="1.0" encoding="UTF-8"?>\n<OAI-PMH' + xmlns
            + b"><responseDate>2025-03-01T09:00:00Z</responseDate><request>x</request>"
            + inner + b"</OAI-PMH>")


def _oai_identify() -> bytes:
    return _oai_envelope(b"<Identify><repositoryName>trap</repositoryName><granularity>"
                         b"YYYY-MM-DDThh:mm:ssZ</granularity><deletedRecord>no</deletedRecord>"
                         b"</Identify>")


def _oai_record(ctx: Ctx) -> bytes:
    return (b"<record><header><identifier>oai:trap:" + ctx.name.encode() + b"</identifier>"
            b"<datestamp>2025-03-01</datestamp></header><metadata><oai_dc:dc xmlns:oai_dc="
            b'"http://www.openarchives.org/OAI/2.0/oai_dc/" xmlns:dc="http://purl.org/dc/'
            b'elements/1.1/"><dc:title>t</dc:title><dc:rights>CC0-1.0</dc:rights>'
            b"<dc:identifier>" + ctx.sites[ctx.name].encode() + b"/good-a.png</dc:identifier>"
            b"</oai_dc:dc></metadata></record>")


XML = {"Content-Type": "text/xml; charset=utf-8"}


def oai_bomb(h: H, ctx: Ctx) -> None:
    """Identify answers normally; ListRecords is a billion-laughs entity bomb."""
    if "Identify" in h.path:
        send(h, 200, _oai_identify(), XML)
        return
    body = (b'<?xml version="1.0"?>\n<!DOCTYPE OAI-PMH [\n' + _entities() + b"]>\n"
            + _oai_envelope(b"<ListRecords>" + _oai_record(ctx).replace(
                b"<dc:title>t</dc:title>", b"<dc:title>&l9;</dc:title>") + b"</ListRecords>"
                )[len(b'<?xml version="1.0" encoding="UTF-8"?>\n'):])
    send(h, 200, body, XML)


def oai_endless_token(h: H, ctx: Ctx) -> None:
    """Every ListRecords page hands out a fresh resumptionToken: the list never ends."""
    if "Identify" in h.path:
        send(h, 200, _oai_identify(), XML)
        return
    n = int(h.path.rsplit("resumptionToken=t", 1)[-1]) + 1 if "resumptionToken" in h.path else 1
    body = _oai_envelope(b"<ListRecords>" + _oai_record(ctx)
                         + b"<resumptionToken>t%d</resumptionToken></ListRecords>" % n)
    send(h, 200, body, XML)


def oai_utf7(h: H, ctx: Ctx) -> None:
    """Identify answers normally; ListRecords declares UTF-7 (its title "+2AA-" would decode
    to a lone surrogate), an encoding the XML parser refuses to read."""
    if "Identify" in h.path:
        send(h, 200, _oai_identify(), XML)
        return
    body = _oai_envelope(b"<ListRecords>" + _oai_record(ctx).replace(
        b"<dc:title>t</dc:title>", b"<dc:title>+2AA-</dc:title>") + b"</ListRecords>")
    send(h, 200, body.replace(b'encoding="UTF-8"', b'encoding="UTF-7"'),
         {"Content-Type": "text/xml; charset=utf-7"})


def oai_no_namespace(h: H, ctx: Ctx) -> None:
    """Every answer looks like OAI-PMH but has no namespace (§3.2 requires it)."""
    inner = (b"<Identify><granularity>YYYY-MM-DD</granularity></Identify>"
             if "Identify" in h.path else b"<ListRecords>" + _oai_record(ctx).replace(
                 b"oai_dc:", b"").replace(b"dc:", b"") + b"</ListRecords>")
    send(h, 200, _oai_envelope(inner, namespace=False), XML)


# --- the table -----------------------------------------------------------------------------
@dataclass(frozen=True)
class Case:
    """One misbehaviour: what the server does and how the run must record it.

    kind "image": the lister lists one item (source_key = name) whose image URL is ``path`` on
    the case's own host; ``state``/``reason`` are that item's expected ledger outcome.
    kind "json"/"html"/"oai"/"iiif": a source of its own starting at ``path``; ``reason`` is
    the note kind the source must leave (or None), and every item it lists must be stored.
    """

    name: str
    misbehaviour: str
    kind: str
    path: str
    handler: Callable[[H, Ctx], None]
    state: str | None = None
    reason: str | None = None
    flag: str | None = None  # a flag the stored file must carry
    robots: Callable[[H, Ctx], None] | None = None
    why: str = ""  # why this outcome is the right one (accepted cases)
    tdmrep: Callable[[H, Ctx], None] | None = None  # /.well-known/tdmrep.json (else 404)
    signal: str | None = None  # text the ledger's reservation_signals must hold for the item


IMG = "/img/picture.png"
BACKSLASH_TRICK = "http://{forbidden_netloc}\\@{fence_netloc}/picture.png"
FULLWIDTH_TRICK = "http://{forbidden_netloc}\uff20{fence_netloc}/picture.png"
CD = "attachment; filename="

CASES: list[Case] = [
    Case("truncated-honest", "truncated body, honest Content-Length", "image", IMG,
         truncated_honest, "failed", "connection"),
    Case("truncated-lying", "truncated body, Content-Length lies to match", "image", IMG,
         truncated_lying, "rejected", "broken_image"),
    Case("endless", "endless body, no Content-Length", "image", IMG, endless,
         "rejected", "too_large"),
    Case("over-cap", "Content-Length 10 GB (over max_image_bytes)", "image", IMG, over_cap,
         "rejected", "too_large"),
    Case("slow-drip", "slow drip, one byte per second", "image", IMG, slow_drip,
         "failed", "timeout"),
    Case("stalled", "headers, then a stalled connection", "image", IMG, stalled,
         "failed", "timeout"),
    Case("reset", "connection reset mid-body", "image", IMG, reset_mid_body,
         "failed", "connection"),
    Case("redirect-loop", "redirect loop (to itself)", "image", IMG, redirect(IMG),
         "failed", "redirect_blocked"),
    Case("redirect-chain", "20-hop redirect chain", "image", "/hop/20.png", hops,
         "failed", "redirect_blocked"),
    Case("redirect-file", "redirect to file:///etc/passwd", "image", IMG,
         redirect("file:///etc/passwd"), "failed", "unsafe_url"),
    Case("redirect-ftp", "redirect to ftp://", "image", IMG,
         redirect("ftp://127.0.0.1/picture.png"), "failed", "unsafe_url"),
    Case("redirect-data", "redirect to a data: URI", "image", IMG,
         redirect("data:image/png;base64,iVBORw0KGgo="), "failed", "unsafe_url"),
    Case("redirect-javascript", "redirect to javascript:", "image", IMG,
         redirect("javascript:alert(1)"), "failed", "unsafe_url"),
    Case("redirect-private", f"redirect to {FORBIDDEN_HOST} (not allowed)", "image", IMG,
         redirect("{forbidden}/secret.png"), "failed", "unsafe_url"),
    Case("link-private", f"listing links to {FORBIDDEN_HOST} (not allowed)", "image",
         "{forbidden}/secret.png", serve(b""), "failed", "unsafe_url"),
    # One URL reading for guard and transport (http_target.py): a backslash ends the
    # authority for the HTTP library but not for urllib.parse, so these name the allowed
    # fence host to one parser and the forbidden host to the other.
    Case("redirect-backslash", "redirect to forbidden\\@allowed (parsers disagree)", "image",
         IMG, redirect(BACKSLASH_TRICK), "failed", "unsafe_url"),
    Case("link-backslash", "listing links to forbidden\\@allowed", "image", BACKSLASH_TRICK,
         serve(b""), "failed", "unsafe_url"),
    Case("link-fullwidth-at", "listing links to forbidden\uff20allowed (full-width @)", "image",
         FULLWIDTH_TRICK, serve(b""), "failed", "unsafe_url"),
    Case("link-lone-surrogate", "listing links to an image URL holding a lone surrogate",
         "image", "/img/picture\udc00.png", serve(noise_image), "failed", "unsafe_url"),
    Case("redirect-bad-ipv6", "redirect to http://[::1/img/x.png (unclosed IPv6)", "image", IMG,
         redirect("http://[::1/img/x.png"), "failed", "unsafe_url"),
    Case("redirect-robots", "redirect to a robots-disallowed path on another host", "image",
         IMG, redirect("{fence}/private/picture.png"), "blocked", "robots_disallowed"),
    Case("html-as-image", "HTML page served as image/png", "image", IMG,
         serve(b"<!DOCTYPE html><html><body>Not found</body></html>"), "rejected",
         "not_an_image"),
    Case("lying-extension", "JPEG bytes at .png, Content-Type image/png", "image", IMG,
         serve(lambda n: noise_image(n, "JPEG")), "stored", None,
         flag="type_mismatch:content_type+url_ext",
         why="the bytes decide the format; the store names it .jpg and the file is flagged"),
    Case("png-bomb", "PNG decompression bomb (400 MP in 50 KB)", "image", IMG,
         serve(lambda n: png_bomb()), "rejected", "decompression_bomb"),
    Case("gif-bomb", "GIF decompression bomb (65535x65535)", "image", "/img/picture.gif",
         serve(lambda n: gif_bomb(), "image/gif"), "rejected", "decompression_bomb"),
    Case("png-bad-crc", "PNG with a corrupt IDAT CRC", "image", IMG, serve(png_bad_crc),
         "rejected", "broken_image"),
    Case("jpeg-trailer", "JPEG with 64 KiB of garbage after EOI", "image", "/img/picture.jpg",
         serve(jpeg_with_trailer, "image/jpeg"), "stored", None,
         why="every pixel decodes and decoders stop at EOI (ITU T.81 B.2.1); cameras and "
             "editors append trailers; the sha256 still covers every byte"),
    Case("huge-exif", "PNG with a 900 KB EXIF description", "image", IMG,
         serve(png_huge_exif), "stored", None,
         why="metadata is read, not trusted; the image itself is sound"),
    Case("xmp-bomb", "XMP with an entity-expansion (billion laughs) bomb", "image",
         "/img/picture.jpg", serve(jpeg_xmp_bomb, "image/jpeg"), "stored", None,
         flag="xmp_unreadable",
         why="defusedxml refuses entities; the XMP is recorded as unreadable"),
    Case("retry-after-10y", "503 with Retry-After of 10 years", "image", IMG,
         status(503, "315360000"), "deferred", "host_parked"),
    Case("retry-after-negative", "503 with Retry-After -30", "image", IMG,
         status(503, "-30"), "failed", "http_503"),
    Case("retry-after-garbage", "503 with Retry-After garbage", "image", IMG,
         status(503, "soon-ish, maybe"), "failed", "http_503"),
    Case("retry-after-huge", "503 with a 400-digit Retry-After", "image", IMG,
         status(503, "9" * 400), "deferred", "host_parked"),
    Case("storm-429", "429 on every request", "image", IMG, status(429, None),
         "failed", "http_429"),
    Case("robots-5mb", "robots.txt of 5 MB", "image", IMG, serve(noise_image), "stored", None,
         robots=big_robots, why="the first 512 KiB are parsed (RFC 9309 §2.5)"),
    Case("robots-binary", "robots.txt of random bytes", "image", IMG, serve(noise_image),
         "stored", None, robots=binary_robots,
         why="lines that do not parse are ignored (RFC 9309 §2.3.1.5); no rule, no limit"),
    Case("robots-redirect-loop", "robots.txt redirect loop", "image", IMG, serve(noise_image),
         "stored", None, robots=robots_redirect_loop,
         why="more than five redirects: unavailable, MAY access anything (RFC 9309 §2.3.1.2)"),
    Case("tdmrep-5mb", "tdmrep.json of 5 MB reserving everything", "image", IMG,
         serve(noise_image), "stored", None, tdmrep=tdmrep_5mb, signal="over 524,288 bytes",
         why="over the 512 KiB read: no usable file, so no rules (TDMRep §3.1); recorded"),
    Case("tdmrep-invalid", "tdmrep.json that is not valid JSON", "image", IMG,
         serve(noise_image), "stored", None, tdmrep=tdmrep_invalid, signal="not valid JSON",
         why="no usable file, so no rules (TDMRep §3.1); recorded in the ledger"),
    Case("tdmrep-100k-rules", "tdmrep.json with 100,000 rules", "image", IMG,
         serve(noise_image), "stored", None, tdmrep=tdmrep_100k, signal="treated as no file",
         why="4 MB, over the 512 KiB read: no usable file (TDMRep §3.1); recorded"),
    Case("tdmrep-redirect-loop", "tdmrep.json redirect loop", "image", IMG,
         serve(noise_image), "stored", None, tdmrep=tdmrep_redirect_loop,
         signal="redirect_blocked",
         why="no representation is reached: the protocol is not implemented (TDMRep §3.1)"),
    Case("tdmrep-503", "tdmrep.json answers 503 every time", "image", IMG,
         serve(noise_image), "deferred", "tdmrep_unknown", tdmrep=tdmrep_down,
         signal="http_503"),
    Case("name-dotdot", "Content-Disposition filename ../../..", "image", IMG,
         serve(noise_image, Content_Disposition=CD + '"../../../../escaped-dotdot.png"'),
         "stored", None, why="files are named by sha256; the server's name is ignored"),
    Case("name-absolute", "Content-Disposition absolute filename", "image", IMG,
         serve(noise_image, Content_Disposition=CD + '"{outside}/escaped-absolute.png"'),
         "stored", None, why="files are named by sha256; the server's name is ignored"),
    Case("name-nul", "Content-Disposition filename with a NUL byte", "image", IMG,
         serve(noise_image, Content_Disposition=CD + '"evil\x00.png"'), "stored", None,
         why="files are named by sha256; the server's name is ignored"),
    Case("name-device", "Content-Disposition filename CON / NUL.png", "image", IMG,
         serve(noise_image, Content_Disposition=CD + '"CON"; filename*=UTF-8\'\'NUL.png'),
         "stored", None, why="files are named by sha256; the server's name is ignored"),
    Case("json-deep", "JSON listing nested 100,000 deep", "json", "/api/a", deep_json,
         reason="bad_json"),
    Case("json-50mb", "50 MB JSON listing (over max_page_bytes)", "json", "/api/a", huge_json,
         reason="too_large"),
    Case("json-cycle", "JSON pagination that cycles", "json", "/api/a", json_cycle,
         reason="loop"),
    Case("json-lone-surrogates", 'JSON listing with lone surrogates ("\\ud800") in its text',
         "json", "/api/a", json_lone_surrogates, reason="invalid_unicode",
         why="each is replaced by U+FFFD and noted; the item is stored as usual"),
    Case("html-invalid-utf8", "HTML listing with invalid UTF-8", "html", "/list/a",
         html_invalid_utf8, reason=None, why="bad bytes are replaced (U+FFFD)"),
    Case("html-utf7-surrogate", "HTML listing in UTF-7 decoding to a lone surrogate", "html",
         "/list/a", html_utf7_surrogate, reason=None,
         why="bad bytes: replaced (U+FFFD) when the page is decoded, as invalid UTF-8 is"),
    Case("html-bogus-charset", "HTML listing with an unknown charset label", "html", "/list/a",
         html_bogus_charset, reason=None, why="an unknown label falls back to UTF-8"),
    Case("html-wrong-charset", "UTF-8 HTML listing labelled UTF-16", "html", "/list/a",
         html_wrong_charset, reason="selector_empty",
         why="the page decodes to noise; the selector note says so"),
    Case("html-cycle", "HTML pagination that cycles", "html", "/list/a", html_cycle,
         reason="loop"),
    Case("oai-xml-bomb", "OAI-PMH ListRecords with an entity-expansion bomb", "oai", "/oai",
         oai_bomb, reason="not_oai_pmh", why="defusedxml refuses the DTD; nothing expanded"),
    Case("oai-endless-token", "OAI-PMH resumptionToken that never ends", "oai", "/oai",
         oai_endless_token, reason="max_pages", why="bounded by max_pages = 5"),
    Case("oai-utf7", "OAI-PMH ListRecords declared in UTF-7", "oai", "/oai", oai_utf7,
         reason="not_oai_pmh", why="OAI-PMH answers are UTF-8; the parser cannot read UTF-7"),
    Case("oai-no-namespace", "OAI-PMH answers without the OAI namespace", "oai", "/oai",
         oai_no_namespace, reason="not_oai_pmh", why="the root element is not OAI-PMH 2.0"),
    Case("iiif-self-manifest", "IIIF manifest that lists itself (and is listed twice)", "iiif",
         hostile_iiif.START, hostile_iiif.self_listing_manifest, reason="loop",
         why="every document is read once; its one canvas is stored"),
    Case("iiif-collection-cycle", "IIIF collection cycle (A -> B -> A)", "iiif",
         hostile_iiif.START, hostile_iiif.collection_cycle, reason="loop"),
    Case("iiif-lone-surrogates", "IIIF manifest with lone surrogates in its labels and a "
         "member id", "iiif", hostile_iiif.START, hostile_iiif.surrogate_labels,
         reason="invalid_unicode",
         why="labels get U+FFFD and a note; the member whose URL cannot be sent is a note"),
    Case("iiif-billion-pixels", "IIIF info.json claiming 10^9 x 10^9 pixels", "iiif",
         hostile_iiif.START, hostile_iiif.billion_pixels, reason=None,
         why="only the target size is asked for (!2048,2048), never the full size"),
]
CASE_NAMES = [c.name for c in CASES]


# --- servers -------------------------------------------------------------------------------
@dataclass
class Ctx:
    """What a handler knows: its case name and the other sites' base URLs."""

    name: str
    sites: dict[str, str]
    drip_interval: float = 1.0

    def fill(self, template: str) -> str:
        """Replace {forbidden}, {fence}, {outside} and {self} in a template."""
        return template.format(**self.sites, self=self.sites.get(self.name, ""))


DEFAULT_ROBOTS = (200, b"User-agent: *\nAllow: /\n", {"Content-Type": "text/plain"})
NO_TDMREP = (404, b"no tdmrep.json here", {"Content-Type": "text/plain"})


def case_server(ctx: Ctx, host: str = "127.0.0.1",
                handler: Callable[[H, Ctx], None] | None = None,
                robots: Callable[[H, Ctx], None] | None = None,
                routes: dict[str, Callable[[H, Ctx], None]] | None = None,
                tdmrep: Callable[[H, Ctx], None] | None = None) -> LoopbackServer:
    """One loopback server: robots.txt (allow all unless given), ``routes`` by path prefix,
    ``handler`` for everything else; its ``hits`` log every request."""
    def bind(route: Callable[[H, Ctx], None]) -> Callable[[H], None]:
        return lambda h: route(h, ctx)

    server = LoopbackServer(host)
    server.route("/robots.txt", DEFAULT_ROBOTS if robots is None else bind(robots))
    server.route("/.well-known/tdmrep.json", NO_TDMREP if tdmrep is None else bind(tdmrep))
    server.prefixes.update({prefix: bind(r) for prefix, r in (routes or {}).items()})
    server.fallback = None if handler is None else bind(handler)
    return server


def _good(name: str) -> Callable[[H, Ctx], None]:
    return serve(lambda _: noise_image(name))


class HostileArchive:
    """Every case's site plus the lister, the fence and the forbidden site."""

    def __init__(self, cases: list[Case] | None = None, outside: Path | None = None,
                 drip_interval: float = 1.0) -> None:
        self.cases = list(CASES if cases is None else cases)
        self.sites_base: dict[str, str] = {"outside": str(outside or "/nonexistent")}
        self.sites: dict[str, LoopbackServer] = {}

        def ctx(name: str) -> Ctx:
            return Ctx(name, self.sites_base, drip_interval)

        self.forbidden = self._add("forbidden", case_server(ctx("forbidden"), FORBIDDEN_HOST,
                                                     serve(lambda _: noise_image("x"))))
        self.fence = self._add("fence", case_server(
            ctx("fence"), handler=serve(lambda _: noise_image("fence")),
            robots=serve(b"User-agent: *\nDisallow: /private/\n", "text/plain")))
        for case in self.cases:
            routes = {f"/good-{p}": _good(f"{case.name}-{p}") for p in ("a", "b")}
            routes["/good"] = _good(f"{case.name}-good")
            self._add(case.name, case_server(ctx(case.name), handler=case.handler,
                                      robots=case.robots, routes=routes, tdmrep=case.tdmrep))
        self.lister = self._add("lister", case_server(ctx("lister"), routes={
            "/api/items": self._listing, "/good.png": _good("normal")}))

    def _add(self, name: str, site: LoopbackServer) -> LoopbackServer:
        self.sites[name] = site
        self.sites_base[name] = site.base
        self.sites_base[f"{name}_netloc"] = site.base.split("//", 1)[1]
        return site

    def url(self, case: Case) -> str:
        """The absolute URL a case's item or source starts at."""
        return Ctx(case.name, self.sites_base).fill(case.path) if "{" in case.path else (
            self.sites[case.name].base + case.path)

    def _listing(self, h: H, ctx: Ctx) -> None:
        items = [{"id": c.name, "image": self.url(c), "licence": "CC0-1.0"}
                 for c in self.cases if c.kind == "image"]
        items.append({"id": "normal", "image": self.sites["lister"].base + "/good.png",
                      "licence": "CC0-1.0"})
        send(h, 200, json.dumps({"items": items}).encode(), {"Content-Type": "application/json"})

    def recipe(self, *, read_timeout: float = 1.0, download_deadline: float = 2.5) -> str:
        """A recipe over every case: short timeouts, small caps, fast back-off."""
        parts = [f"""contact = "hostile-tests@example.org"

[budgets]
min_interval = 0.0
max_attempts = 2
max_retry_after = 5
backoff_base = 0.05
backoff_max = 0.2

[network]
connect_timeout = 2.0
read_timeout = {read_timeout}
download_deadline = {download_deadline}
max_image_bytes = 1_000_000
max_page_bytes = 1_000_000
allow_addresses = ["127.0.0.1"]

[[sources]]
name = "lister"
kind = "json_api"
url = "{self.sites['lister'].base}/api/items"
[sources.fields]
items = "items"
id = "id"
image_url = "image"
licence = "licence"
"""]
        for case in self.cases:
            if case.kind == "json":
                parts.append(f"""
[[sources]]
name = "{case.name}"
kind = "json_api"
url = "{self.url(case)}"
[sources.pagination]
style = "next_url"
next_path = "next"
[sources.fields]
items = "items"
id = "id"
image_url = "image"
licence = "licence"
""")
            elif case.kind == "oai":
                parts.append(f"""
[[sources]]
name = "{case.name}"
kind = "oai_pmh"
url = "{self.url(case)}"
max_pages = 5
""")
            elif case.kind == "iiif":
                parts.append(f"""
[[sources]]
name = "{case.name}"
kind = "iiif"
url = "{self.url(case)}"
""")
            elif case.kind == "html":
                parts.append(f"""
[[sources]]
name = "{case.name}"
kind = "html"
listing_pages = ["{self.url(case)}"]
[sources.select]
item = "li.tile"
image = "img"
licence = ".licence"
""")
        return "".join(parts)

    def close(self) -> None:
        """Stop every site."""
        for site in self.sites.values():
            site.close()

    def __enter__(self) -> HostileArchive:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
