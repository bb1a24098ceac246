"""Invented names and the ways the archive writes its licences.

All names are made up for the fictional Fernhollow Field Society. Licence strings show
the forms real archives use (SPDX ids, full names, deed and legal-code URLs); the
expected SPDX ids follow standards.md §7.
"""

from __future__ import annotations

from typing import NamedTuple


class Licence(NamedTuple):
    """A declared licence as the archive writes it, and the SPDX id it must map to."""

    text: str | None
    url: str | None
    spdx: str | None


CC = "https://creativecommons.org"

# Allowed by the demo policy; cycled through by ordinary items.
ALLOWED: tuple[Licence, ...] = (
    Licence("CC-BY-4.0", None, "CC-BY-4.0"),
    Licence("CC BY-SA 4.0", f"{CC}/licenses/by-sa/4.0/", "CC-BY-SA-4.0"),
    Licence("Creative Commons Attribution 4.0 International",
            f"{CC}/licenses/by/4.0/deed.en", "CC-BY-4.0"),
    Licence("Creative Commons Attribution-ShareAlike 4.0 International", None,
            "CC-BY-SA-4.0"),
    Licence(None, f"{CC}/licenses/by/4.0/legalcode", "CC-BY-4.0"),
    Licence("Public Domain Mark 1.0", f"{CC}/publicdomain/mark/1.0/", "CC-PDM-1.0"),
    Licence("CC0 1.0 Universal", f"{CC}/publicdomain/zero/1.0/", "CC0-1.0"),
    Licence("CC-BY-SA-3.0", None, "CC-BY-SA-3.0"),
    Licence(None, f"{CC}/licenses/by/2.0/", "CC-BY-2.0"),
)

# HTML pages always show some text; the rel="license" link carries the URL when present.
GALLERY_TEXT_LICENCES: tuple[Licence, ...] = (
    Licence("CC BY 4.0", f"{CC}/licenses/by/4.0/", "CC-BY-4.0"),
    Licence("CC BY-SA 4.0", f"{CC}/licenses/by-sa/4.0/deed.en", "CC-BY-SA-4.0"),
    Licence("Public Domain Mark 1.0", f"{CC}/publicdomain/mark/1.0/", "CC-PDM-1.0"),
    Licence("CC0 1.0", f"{CC}/publicdomain/zero/1.0/legalcode", "CC0-1.0"),
    Licence("Creative Commons Attribution 3.0 Unported", f"{CC}/licenses/by/3.0/",
            "CC-BY-3.0"),
    Licence("CC-BY-SA-4.0", None, "CC-BY-SA-4.0"),
)

CREATORS: tuple[str, ...] = (
    "R. Quillfeather", "T. Mossbank", "E. Thistledown", "J. Bramblecote", "M. Fernwhistle",
    "A. Ashcombe", "L. Lichenworth", "P. Wrenhollow", "S. Pebblethwaite", "K. Sorrelby",
    "Fernhollow Field Society",
)

SUBJECTS: tuple[str, ...] = (
    "Pressed leaf", "Banded feather", "Speckled stone", "Ground beetle", "Crust lichen",
    "Lobed leaf", "Barred feather", "River pebble", "Leaf beetle", "Leafy lichen",
)

PLACES: tuple[str, ...] = (
    "Fernhollow Brook", "Lower Sedgemere", "Cairnwick Moor", "Thornby Copse",
    "Mossfold Quarry", "Wrenmere Fen", "Ashby Hollow", "Quillan Ridge",
)
