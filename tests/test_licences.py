"""Licence normalisation, allow-list and rights-conflict checks.

Expected ids come from standards.md section 7 (SPDX License List XML sources, v3.28.0) unless a
comment says otherwise; behaviour of license-expression from libraries.md section 4.
"""

from __future__ import annotations

import license_expression as le
import pytest

from collector.checks.licences import (
    DEFAULT_ALLOW,
    licence_allowed,
    licence_conditions,
    licence_deed_url,
    normalise_licence,
    rights_conflict,
)

# (text, url, expected SPDX id) -- standards.md section 7 table and "URL forms".
CASES = [
    ("CC-BY-4.0", None, "CC-BY-4.0"),
    ("cc-by-4.0", None, "CC-BY-4.0"),  # libraries.md 4: case normalised
    ("CC BY 4.0", None, "CC-BY-4.0"),
    ("CC-BY 4.0", None, "CC-BY-4.0"),
    ("Creative Commons Attribution 4.0 International", None, "CC-BY-4.0"),
    (None, "https://creativecommons.org/licenses/by/4.0/", "CC-BY-4.0"),
    (None, "http://www.creativecommons.org/licenses/by/4.0", "CC-BY-4.0"),  # http, www, no slash
    (None, "https://creativecommons.org/licenses/by-sa/4.0/legalcode.de", "CC-BY-SA-4.0"),
    (None, "https://creativecommons.org/licenses/by-nc-nd/4.0/deed.de", "CC-BY-NC-ND-4.0"),
    (None, "https://creativecommons.org/licenses/by/3.0/us/legalcode", "CC-BY-3.0-US"),
    (None, "https://creativecommons.org/licenses/by-sa/3.0/de/", "CC-BY-SA-3.0-DE"),
    (None, "https://creativecommons.org/licenses/by-sa/2.0/uk/", "CC-BY-SA-2.0-UK"),
    (None, "https://creativecommons.org/licenses/by/2.5/au/", "CC-BY-2.5-AU"),
    (None, "https://creativecommons.org/licenses/by-nd-nc/1.0/", "CC-BY-NC-ND-1.0"),  # 1.0 quirk
    (None, "https://creativecommons.org/publicdomain/zero/1.0/legalcode", "CC0-1.0"),
    (None, "https://creativecommons.org/publicdomain/mark/1.0/", "CC-PDM-1.0"),
    (None, "https://creativecommons.org/licenses/publicdomain/", "CC-PDDC"),
    ("CC BY-NC-SA 2.0", None, "CC-BY-NC-SA-2.0"),
    ("Creative Commons Attribution-NonCommercial-ShareAlike 4.0 International", None,
     "CC-BY-NC-SA-4.0"),
    ("Creative Commons Attribution-NoDerivs 3.0 Unported", None, "CC-BY-ND-3.0"),
    ("Creative Commons Attribution-ShareAlike 2.5 Generic", None, "CC-BY-SA-2.5"),
    ("Creative Commons Attribution 3.0 Germany", None, "CC-BY-3.0-DE"),
    ("CC BY-SA 3.0 DE", None, "CC-BY-SA-3.0-DE"),
    ("Public Domain Mark 1.0", None, "CC-PDM-1.0"),
    ("CC0 1.0 Universal", None, "CC0-1.0"),
    ("LicenseRef-scancode-cc-pdm-1.0", None, "CC-PDM-1.0"),  # libraries.md 4: alias in the index
    ("CC-BY-SA-4.0 OR CC0-1.0", None, "CC-BY-SA-4.0 OR CC0-1.0"),
    ("https://creativecommons.org/licenses/by/4.0/", None, "CC-BY-4.0"),  # URL given as text
    # Ports without an SPDX id must not fall back to the unported id (standards.md 7).
    (None, "https://creativecommons.org/licenses/by/3.0/fr/legalcode", None),
    ("Creative Commons Attribution 3.0 Spain", None, None),
    # Unversioned inputs stay unknown on purpose (libraries.md 4), except CC0, whose only
    # version is 1.0 (SPDX License List 3.28.0: CC0-1.0 is its one id; issue 15).
    ("CC0", None, "CC0-1.0"),
    ("cc-by-sa", None, None),
    ("public domain", None, None),
    ("All rights reserved", None, None),
    ("", None, None),
    (None, None, None),
]  # fmt: skip


@pytest.mark.parametrize(("text", "url", "expected"), CASES)
def test_normalise_licence_maps_inputs_to_the_spdx_list(text, url, expected):
    """Each text/URL form maps to the SPDX id standards.md section 7 names (or to None)."""
    assert normalise_licence(text, url).spdx_id == expected


def test_every_emitted_id_exists_in_the_license_expression_index():
    """No input produces an id that license-expression's SPDX index does not know."""
    licensing = le.get_spdx_licensing()
    for text, url, _ in CASES:
        got = normalise_licence(text, url).spdx_id
        if got:
            assert not licensing.validate(got).errors, got


def test_public_domain_mark_is_not_mapped_to_pddc():
    """PDM maps to CC-PDM-1.0, never to the retired CC-PDDC (standards.md section 7)."""
    info = normalise_licence(
        "Public Domain Mark 1.0", "https://creativecommons.org/publicdomain/mark/1.0/"
    )
    assert info.spdx_id == "CC-PDM-1.0"
    assert info.conflict is None


def test_url_that_crashes_license_expression_validate_is_handled():
    """A non-CC URL as text (validate() raises AttributeError on it) gives None, no crash."""
    licensing = le.get_spdx_licensing()
    url = "https://example.org/terms-of-use"
    with pytest.raises(AttributeError):  # libraries.md section 4: the library bug
        licensing.validate(url)
    info = normalise_licence(url, None)
    assert info.spdx_id is None and info.method is None


def test_unlisted_port_carries_a_note_instead_of_an_id():
    """An unlisted port is reported in the note (standards.md 7: do not map it to unported)."""
    info = normalise_licence(None, "https://creativecommons.org/licenses/by/3.0/fr/")
    assert info.spdx_id is None
    assert "CC-BY-3.0-FR" in (info.note or "")


def test_methods_name_how_the_id_was_found():
    """The method field records which step matched."""
    assert normalise_licence("cc-by-4.0", None).method == "spdx-id"
    assert normalise_licence("CC BY 4.0", None).method == "cc-name"
    assert (
        normalise_licence(None, "https://creativecommons.org/licenses/by/4.0/").method == "cc-url"
    )
    assert normalise_licence("CC-BY-4.0 AND CC0-1.0", None).method == "expression"
    assert normalise_licence("LicenseRef-scancode-cc-pdm-1.0", None).method == "alias"


def test_text_and_url_that_disagree_keep_the_text_and_record_the_conflict():
    """Text says BY, URL says BY-NC: the text's id is returned and the conflict is exposed."""
    info = normalise_licence("CC BY 4.0", "https://creativecommons.org/licenses/by-nc/4.0/")
    assert info.spdx_id == "CC-BY-4.0"
    assert "CC-BY-NC-4.0" in (info.conflict or "")


def test_all_rights_reserved_text_beside_a_cc_url_is_unknown_with_conflict():
    """'All rights reserved' with a CC URL yields no id and a recorded conflict."""
    info = normalise_licence("All rights reserved", "https://creativecommons.org/licenses/by/4.0/")
    assert info.spdx_id is None
    assert info.conflict


def test_url_decides_when_the_text_is_not_a_licence():
    """Free text that names no licence defers to the URL."""
    info = normalise_licence(
        "Please credit the society", "https://creativecommons.org/licenses/by/2.0/"
    )
    assert (info.spdx_id, info.method, info.conflict) == ("CC-BY-2.0", "cc-url", None)


def test_default_allow_holds_public_domain_and_unported_by_and_by_sa_versions():
    """DEFAULT_ALLOW = CC0, PDM and unported CC BY / BY-SA 1.0-4.0 (standards.md section 7)."""
    expected = {"CC0-1.0", "CC-PDM-1.0"} | {
        f"CC-{code}-{ver}"
        for code in ("BY", "BY-SA")
        for ver in ("1.0", "2.0", "2.5", "3.0", "4.0")
    }
    assert set(DEFAULT_ALLOW) == expected


@pytest.mark.parametrize(
    ("spdx_id", "expected"),
    [
        ("CC-BY-4.0", (True, None)),
        ("CC-BY-SA-2.5", (True, None)),
        ("CC-BY-NC-4.0", (False, "licence_not_allowed")),
        ("CC-BY-SA-3.0-DE", (False, "licence_not_allowed")),  # ports are opt-in
        ("CC-BY-NC-4.0 OR CC0-1.0", (True, None)),  # any alternative suffices
        ("CC-BY-4.0 AND CC-BY-NC-4.0", (False, "licence_not_allowed")),  # all must pass
        ("CC-BY-4.0 AND CC-PDM-1.0", (True, None)),
        (None, (False, "licence_unknown")),
        ("LicenseRef-fernhollow-own", (False, "licence_unknown")),
    ],
)
def test_licence_allowed_applies_the_default_allow_list(spdx_id, expected):
    """Allow-list decision with SPDX expression semantics (OR = any, AND = all)."""
    assert licence_allowed(spdx_id, list(DEFAULT_ALLOW), False) == expected


def test_allow_unknown_lets_unmapped_licences_through():
    """allow_unknown=True accepts a missing licence."""
    assert licence_allowed(None, list(DEFAULT_ALLOW), True) == (True, None)


def test_allow_list_entries_are_matched_case_insensitively():
    """A lower-case allow entry still matches the canonical id."""
    assert licence_allowed("CC-BY-NC-4.0", ["cc-by-nc-4.0"], False) == (True, None)


@pytest.mark.parametrize(
    ("spdx_id", "url"),
    [
        ("CC-BY-4.0", "https://creativecommons.org/licenses/by/4.0/"),
        ("CC-BY-SA-3.0-DE", "https://creativecommons.org/licenses/by-sa/3.0/de/"),
        ("CC-BY-NC-ND-1.0", "https://creativecommons.org/licenses/by-nd-nc/1.0/"),  # quirk
        ("CC0-1.0", "https://creativecommons.org/publicdomain/zero/1.0/"),
        ("CC-PDM-1.0", "https://creativecommons.org/publicdomain/mark/1.0/"),
        ("MIT", None),
    ],
)
def test_deed_url_is_built_from_the_id_and_maps_back(spdx_id, url):
    """Deed URLs follow standards.md section 7 URL forms and normalise back to the same id."""
    assert licence_deed_url(spdx_id) == url
    if url:
        assert normalise_licence(None, url).spdx_id == spdx_id


def test_conditions_list_the_licence_elements():
    """BY-NC-SA lists attribution, non-commercial and share-alike; CC0 is public domain."""
    assert licence_conditions("CC-BY-NC-SA-4.0") == [
        "attribution required",
        "non-commercial",
        "share-alike",
    ]
    assert licence_conditions("CC0-1.0") == ["public domain"]
    assert licence_conditions("CC-PDM-1.0") == ["public domain"]
    assert licence_conditions(None) == []


def test_rights_conflict_reports_a_different_licence_in_the_iptc_notice():
    """An IPTC notice naming CC BY-NC contradicts a declared CC-BY-4.0."""
    msg = rights_conflict("CC-BY-4.0", {"iptc_copyright": "(c) A. Fern, CC BY-NC 4.0"})
    assert msg and "iptc_copyright" in msg and "CC-BY-NC-4.0" in msg


def test_rights_conflict_is_none_when_embedded_rights_agree():
    """Matching WebStatement and copyright notice give no conflict."""
    rights = {
        "xmp_web_statement": "https://creativecommons.org/licenses/by/4.0/",
        "exif_copyright": "Fernhollow Field Society, CC BY 4.0",
        "exif_artist": "A. Fern",
    }
    assert rights_conflict("CC-BY-4.0", rights) is None


def test_rights_conflict_flags_all_rights_reserved_and_marked_against_public_domain():
    """'All rights reserved' and xmpRights:Marked=True contradict CC0 (standards.md 6.3)."""
    msg = rights_conflict("CC0-1.0", {"exif_copyright": "All rights reserved", "xmp_marked": True})
    assert msg and "All rights reserved" in msg and "Marked=True" in msg


def test_rights_conflict_flags_marked_false_against_a_restrictive_licence():
    """xmpRights:Marked=False means public domain (standards.md 6.3), contradicting CC BY-NC."""
    assert rights_conflict("CC-BY-NC-4.0", {"xmp_marked": False})


def test_rights_conflict_is_none_without_embedded_rights():
    """Nothing embedded means nothing to contradict."""
    assert rights_conflict("CC-BY-4.0", {}) is None
    assert rights_conflict(None, {"exif_copyright": "All rights reserved"}) is None
