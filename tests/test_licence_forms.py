"""Licence recognition measured on the forms archives really write (issue 15).

Each row is (text, url, expected SPDX id or None for "unknown"). Where the forms come from:
- [CC-deed]: the title Creative Commons gives a licence on its deed page ("Attribution 4.0
  International", "CC BY 4.0" as the short form) and the deed/legal-code URL patterns
  (creativecommons.org/licenses/<code>/<version>/[deed.<lang>|legalcode[.<lang>]]);
- [CC-legal]: the title of the legal code ("Creative Commons Attribution 4.0 International Public
  License");
- [CC-l10n]: the translated deed titles, which keep the short form in parentheses
  ("Namensnennung 4.0 International (CC BY 4.0)");
- [SPDX]: the SPDX License List, version 3.28.0 (full names and ids; standards.md section 7);
- [issue15]: the strings issue 15 found missed or expected to stay unknown.
Expected ids are those of the SPDX License List 3.28.0 (standards.md section 7); None means the
string does not name one licence unambiguously (no version, an unlisted port, several licences,
or no licence at all) and must stay "unknown".
"""

from __future__ import annotations

import pytest

from collector.checks.licences import licence_allowed, normalise_licence

FORMS: list[tuple[str | None, str | None, str | None]] = [
    # --- URLs [CC-deed], standards.md 7 "URL forms" ---
    (None, "https://creativecommons.org/licenses/by/4.0/", "CC-BY-4.0"),
    (None, "https://creativecommons.org/licenses/by/4.0/deed.en", "CC-BY-4.0"),
    (None, "https://creativecommons.org/licenses/by-sa/4.0/legalcode", "CC-BY-SA-4.0"),
    (None, "https://creativecommons.org/licenses/by-nc/4.0/legalcode.fr", "CC-BY-NC-4.0"),
    (None, "http://creativecommons.org/licenses/by-nd/3.0/", "CC-BY-ND-3.0"),
    (None, "http://creativecommons.org/licenses/by-nc-sa/3.0", "CC-BY-NC-SA-3.0"),
    (None, "https://creativecommons.org/licenses/by-nc-nd/2.5/", "CC-BY-NC-ND-2.5"),
    (None, "https://creativecommons.org/licenses/by/2.0/", "CC-BY-2.0"),
    (None, "https://creativecommons.org/licenses/by-sa/1.0/", "CC-BY-SA-1.0"),
    (None, "https://creativecommons.org/licenses/by-nd-nc/1.0/", "CC-BY-NC-ND-1.0"),
    (None, "https://creativecommons.org/licenses/by/3.0/us/", "CC-BY-3.0-US"),
    (None, "https://creativecommons.org/licenses/by/3.0/de/deed.de", "CC-BY-3.0-DE"),
    (None, "https://creativecommons.org/licenses/by-sa/3.0/at/", "CC-BY-SA-3.0-AT"),
    (None, "https://creativecommons.org/licenses/by/3.0/igo/", "CC-BY-3.0-IGO"),
    (None, "https://creativecommons.org/publicdomain/zero/1.0/", "CC0-1.0"),
    (None, "https://creativecommons.org/publicdomain/zero/1.0/deed.de", "CC0-1.0"),
    (None, "https://creativecommons.org/publicdomain/mark/1.0/", "CC-PDM-1.0"),
    (None, "https://creativecommons.org/licenses/by/4.0/?ref=chooser-v1", "CC-BY-4.0"),
    (None, "https://creativecommons.org/licenses/by/4.0/#", "CC-BY-4.0"),
    # [issue15] protocol-relative URLs, as HTML templates write them
    (None, "//creativecommons.org/licenses/by-nc/4.0/", "CC-BY-NC-4.0"),
    ("//creativecommons.org/licenses/by-sa/4.0/", None, "CC-BY-SA-4.0"),
    (None, "//creativecommons.org/publicdomain/zero/1.0/", "CC0-1.0"),
    # an unlisted port is never the unported id (standards.md 7)
    (None, "https://creativecommons.org/licenses/by/3.0/es/", None),
    (None, "https://creativecommons.org/licenses/by-sa/2.5/it/", None),
    # --- short forms [CC-deed] ---
    ("CC BY 4.0", None, "CC-BY-4.0"),
    ("CC BY-SA 4.0", None, "CC-BY-SA-4.0"),
    ("CC BY-NC 4.0", None, "CC-BY-NC-4.0"),
    ("CC BY-NC-SA 4.0", None, "CC-BY-NC-SA-4.0"),
    ("CC BY-NC-ND 4.0", None, "CC-BY-NC-ND-4.0"),
    ("CC BY-ND 4.0", None, "CC-BY-ND-4.0"),
    ("CC BY 3.0", None, "CC-BY-3.0"),
    ("CC BY-SA 2.0", None, "CC-BY-SA-2.0"),
    ("CC BY-SA 3.0 DE", None, "CC-BY-SA-3.0-DE"),
    ("cc by-sa 4.0", None, "CC-BY-SA-4.0"),
    # --- SPDX ids [SPDX] ---
    ("CC-BY-4.0", None, "CC-BY-4.0"),
    ("CC-BY-NC-SA-3.0", None, "CC-BY-NC-SA-3.0"),
    ("CC0-1.0", None, "CC0-1.0"),
    ("CC-PDM-1.0", None, "CC-PDM-1.0"),
    ("CC-BY-3.0-US", None, "CC-BY-3.0-US"),
    # --- SPDX full names [SPDX] and legal-code titles [CC-legal] ---
    ("Creative Commons Attribution 4.0 International", None, "CC-BY-4.0"),
    ("Creative Commons Attribution Share Alike 4.0 International", None, "CC-BY-SA-4.0"),
    ("Creative Commons Attribution Non Commercial 4.0 International", None, "CC-BY-NC-4.0"),
    ("Creative Commons Attribution Non Commercial No Derivatives 4.0 International", None,
     "CC-BY-NC-ND-4.0"),
    ("Creative Commons Attribution 3.0 Unported", None, "CC-BY-3.0"),
    ("Creative Commons Attribution 2.5 Generic", None, "CC-BY-2.5"),
    ("Creative Commons Zero v1.0 Universal", None, "CC0-1.0"),
    ("Creative Commons Attribution 4.0 International Public License", None, "CC-BY-4.0"),
    ("Creative Commons Attribution-ShareAlike 4.0 International Public License", None,
     "CC-BY-SA-4.0"),
    ("Creative Commons Attribution 3.0 United States", None, "CC-BY-3.0-US"),
    ("Creative Commons Attribution-ShareAlike 3.0 Austria", None, "CC-BY-SA-3.0-AT"),
    ("CC0 1.0 Universal", None, "CC0-1.0"),
    ("Public Domain Mark 1.0", None, "CC-PDM-1.0"),
    # --- deed titles without "Creative Commons" [CC-deed], [issue15] ---
    ("Attribution-NonCommercial-ShareAlike 4.0 International", None, "CC-BY-NC-SA-4.0"),
    ("Attribution 4.0 International", None, "CC-BY-4.0"),
    ("Attribution-ShareAlike 4.0 International", None, "CC-BY-SA-4.0"),
    ("Attribution-NoDerivatives 4.0 International", None, "CC-BY-ND-4.0"),
    ("Attribution-NonCommercial 3.0 Unported", None, "CC-BY-NC-3.0"),
    ("Attribution-ShareAlike 2.0 Generic", None, "CC-BY-SA-2.0"),
    # --- bare CC0 [issue15]: one version only (SPDX: CC0-1.0) ---
    ("CC0", None, "CC0-1.0"),
    ("cc0", None, "CC0-1.0"),
    ("CC-0", None, "CC0-1.0"),
    # --- inside a sentence [issue15] ---
    ("Licensed under CC BY 2.0", None, "CC-BY-2.0"),
    ("This work is licensed under a Creative Commons Attribution 4.0 International License.",
     None, "CC-BY-4.0"),
    ("Image: Fernhollow Field Society, CC BY-SA 4.0", None, "CC-BY-SA-4.0"),
    ("Released under CC0 by the photographer", None, "CC0-1.0"),
    ("See https://creativecommons.org/licenses/by/4.0/ for the terms", None, "CC-BY-4.0"),
    ("Licence: //creativecommons.org/licenses/by-nc/4.0/", None, "CC-BY-NC-4.0"),
    # --- localised titles with the short form in parentheses [CC-l10n], [issue15] ---
    ("Namensnennung 4.0 International (CC BY 4.0)", None, "CC-BY-4.0"),
    ("Namensnennung - Weitergabe unter gleichen Bedingungen 4.0 International (CC BY-SA 4.0)",
     None, "CC-BY-SA-4.0"),
    ("Attribution - Pas d'Utilisation Commerciale 4.0 International (CC BY-NC 4.0)", None,
     "CC-BY-NC-4.0"),
    ("Reconocimiento-NoComercial-CompartirIgual 4.0 Internacional (CC BY-NC-SA 4.0)", None,
     "CC-BY-NC-SA-4.0"),
    ("Naamsvermelding 4.0 Internationaal (CC BY 4.0)", None, "CC-BY-4.0"),
    # --- ambiguous: stay unknown [issue15] ---
    ("CC BY", None, None),
    ("CC BY-SA", None, None),
    ("Creative Commons", None, None),
    ("Public Domain", None, None),
    ("public domain", None, None),
    ("Creative Commons Attribution 3.0 Spain", None, None),
    ("CC BY 4.0 or CC BY-SA 4.0", None, None),
    ("All rights reserved", None, None),
    ("© Fernhollow Field Society. All rights reserved. CC BY 4.0", None, None),
    ("No known copyright restrictions", None, None),  # a rights statement (NKC), not a licence
    ("", None, None),
]


def test_the_table_is_large_enough():
    """Issue 15 asks for at least 60 real-world forms."""
    assert len(FORMS) >= 60


@pytest.mark.parametrize(("text", "url", "expected"), FORMS)
def test_real_world_licence_forms(text, url, expected):
    """Each form maps to its SPDX License List 3.28.0 id, or stays unknown when ambiguous."""
    assert normalise_licence(text, url).spdx_id == expected


def test_several_licences_in_a_sentence_say_why_they_stay_unknown():
    """Two different licences in one text leave it unknown, with a note naming both."""
    info = normalise_licence("CC BY 4.0 or CC BY-SA 4.0", None)
    assert info.spdx_id is None
    assert info.note is not None and "CC-BY-4.0" in info.note and "CC-BY-SA-4.0" in info.note


def test_a_licence_found_inside_a_sentence_is_marked_as_such():
    """The method says the id was read from inside a sentence, not from a whole name."""
    assert normalise_licence("Licensed under CC BY 2.0", None).method == "in-text"


def test_the_newly_recognised_forms_pass_the_default_allowlist():
    """A protocol-relative CC BY-SA URL is allowed by default like its https form."""
    from collector.checks.licences import DEFAULT_ALLOW
    spdx = normalise_licence(None, "//creativecommons.org/licenses/by-sa/4.0/").spdx_id
    assert licence_allowed(spdx, DEFAULT_ALLOW, False) == (True, None)


@pytest.mark.parametrize("text", [
    "CC0-1.0x", "CC0 2.0", "CC-BY-4.0X", "CC-BY-4.0.1", "CC BY 4.0x",
    "Creative Commons Attribution 4.0x", "Public Domain Mark 1.0x", "CC BY-SA 4.01",
])
def test_a_version_with_something_glued_to_it_names_no_licence(text):
    """A CC version number that goes on ("4.0x", "4.0.1") or a version the tool never had
    (CC0 and the Public Domain Mark exist in 1.0 only: SPDX License List 3.28.0, CC0-1.0 and
    CC-PDM-1.0) is read as no licence, not as the licence whose name it begins with."""
    assert normalise_licence(text, None).spdx_id is None


@pytest.mark.parametrize(("text", "expected"), [
    ("Licensed under CC-BY-4.0.", "CC-BY-4.0"),        # a sentence's full stop
    ("Released as CC0.", "CC0-1.0"),
    ("CC0 1.0 Universal", "CC0-1.0"),
    ("CC-BY-SA-4.0; see the site", "CC-BY-SA-4.0"),
    ("Public Domain Mark 1.0, no known copyright", "CC-PDM-1.0"),
])
def test_a_version_that_ends_where_it_should_is_still_read(text, expected):
    """The same names followed by punctuation or words are read as before."""
    assert normalise_licence(text, None).spdx_id == expected
