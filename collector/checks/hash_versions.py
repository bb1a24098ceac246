"""The names of the perceptual-hash pipelines, recorded beside every stored hash
(``files.hash_algo``, ``files.window_algo``), and of the way colour and tone facts are made
(``files.colour_algo``): hashes made another way are not compared, and ``collector
remeasure`` makes hashes and facts again. Kept apart from :mod:`collector.checks.phash` and
:mod:`collector.checks.colour_facts` so that ``collector status`` can tell old facts without
importing numpy."""

from __future__ import annotations

__all__ = ["COLOUR_ALGO", "HASH_ALGO", "WINDOW_ALGO"]

# v2: 16-bit, float and transparent pictures hashed through pixels.hash_ready (scaled, on
# white) instead of a clipping convert("L"); 8-bit pictures without transparency hash as in v1.
HASH_ALGO = "dct-phash-64/draft-v2"
# The 16 crop windows of 80 % of each side on a 4x4 grid (collector.checks.phash.WINDOWS).
WINDOW_ALGO = "dct-phash-64/windows-80-4x4-v1"
# The way colour and tone facts are computed (collector.checks.colour_facts; NULL in a row: the
# first way, v1). v2: a JPEG's draft reduced in YCbCr (its grey the Y band), k-means with 2
# rounds on the sample and a last one over every pixel of the work picture (the colours are
# the means of the pixels counted in their shares), colourfulness from sums of products.
COLOUR_ALGO = "lab-kmeans-64px/v2"
