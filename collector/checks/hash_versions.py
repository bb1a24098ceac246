"""The names of the perceptual-hash pipelines, recorded beside every stored hash
(``files.hash_algo``, ``files.window_algo``): hashes made another way are not compared, and
``collector remeasure`` makes them again. Kept apart from :mod:`collector.checks.phash` so
that ``collector status`` can tell old facts without importing numpy."""

from __future__ import annotations

__all__ = ["HASH_ALGO", "WINDOW_ALGO"]

# v2: 16-bit, float and transparent pictures hashed through pixels.hash_ready (scaled, on
# white) instead of a clipping convert("L"); 8-bit pictures without transparency hash as in v1.
HASH_ALGO = "dct-phash-64/draft-v2"
# The 16 crop windows of 80 % of each side on a 4x4 grid (collector.checks.phash.WINDOWS).
WINDOW_ALGO = "dct-phash-64/windows-80-4x4-v1"
