"""RightsStatements.org statements: recognised, kept apart from SPDX, named in the allowlist.

Check values: the RightsStatements.org statement list (rightsstatements.org/page/1.0/, "Available
Rights Statements"): the twelve ids and their English names, the vocab URI pattern
http://rightsstatements.org/vocab/<id>/1.0/ and the page URI pattern
http://rightsstatements.org/page/<id>/1.0/?language=<lang>.
"""

from __future__ import annotations

import pytest

from collector.checks.licences import DEFAULT_ALLOW, licence_allowed, normalise_licence
from collector.checks.rights_statements import STATEMENTS, allow_entry_problem, find_statement
from collector.config.recipe import DEFAULT_LICENCES

# (id, English name) -- RightsStatements.org statement list, version 1.0.
PUBLISHED = [
    ("InC", "In Copyright"),
    ("InC-OW-EU", "In Copyright - EU Orphan Work"),
    ("InC-EDU", "In Copyright - Educational Use Permitted"),
    ("InC-NC", "In Copyright - Non-Commercial Use Permitted"),
    ("InC-RUU", "In Copyright - Rights-holder(s) Unlocatable or Unidentifiable"),
    ("NoC-CR", "No Copyright - Contractual Restrictions"),
    ("NoC-NC", "No Copyright - Non-Commercial Use Only"),
    ("NoC-OKLR", "No Copyright - Other Known Legal Restrictions"),
    ("NoC-US", "No Copyright - United States"),
    ("CNE", "Copyright Not Evaluated"),
    ("UND", "Copyright Undetermined"),
    ("NKC", "No Known Copyright"),
]
CODES = [code for code, _ in PUBLISHED]


def test_all_twelve_statements_are_known():
    """The vocabulary has exactly the twelve published statements."""
    assert sorted(STATEMENTS) == sorted(CODES)


@pytest.mark.parametrize(("code", "name"), PUBLISHED)
def test_statement_read_from_its_english_name(code, name):
    """Each English name reads as its statement, whatever the case."""
    assert find_statement(name).code == code
    assert find_statement(name.upper()).code == code


@pytest.mark.parametrize("code", CODES)
@pytest.mark.parametrize("template", [
    "http://rightsstatements.org/vocab/{}/1.0/",
    "https://rightsstatements.org/vocab/{}/1.0/",
    "http://rightsstatements.org/vocab/{}/1.0",
    "http://rightsstatements.org/page/{}/1.0/?language=en",
    "https://rightsstatements.org/page/{}/1.0/?language=de&foo=1",
    "https://rightsstatements.org/page/{}/1.0",
])
def test_statement_read_from_vocab_and_page_uris(code, template):
    """vocab and page URIs, http or https, with or without slash and query, name the statement."""
    url = template.format(code)
    assert find_statement(None, url).code == code
    assert find_statement(url).code == code  # written into a text field


def test_statement_inside_a_sentence_and_unknown_forms():
    """A URI inside a sentence counts; a bare id, a wrong version or another site do not."""
    assert find_statement("Rights: http://rightsstatements.org/vocab/NoC-US/1.0/ (see page)"
                          ).code == "NoC-US"
    assert find_statement("InC") is None
    assert find_statement(None, "http://rightsstatements.org/vocab/InC/2.0/") is None
    assert find_statement(None, "http://rightsstatements.org/vocab/Foo/1.0/") is None
    assert find_statement(None, "https://example.org/vocab/InC/1.0/") is None


def test_no_known_copyright_restrictions_is_nkc_and_not_a_licence():
    """The common wording 'No known copyright restrictions' is NKC and has no SPDX id."""
    assert find_statement("No known copyright restrictions").code == "NKC"
    assert normalise_licence("No known copyright restrictions", None).spdx_id is None


def test_statements_are_not_spdx_licences():
    """A statement URI never maps to an SPDX id (it is not a licence)."""
    for code in CODES:
        info = normalise_licence(None, f"http://rightsstatements.org/vocab/{code}/1.0/")
        assert info.spdx_id is None


def test_no_statement_is_allowed_by_default_and_never_by_allow_unknown():
    """Default allowlists name no statement; allow_unknown does not let InC through."""
    for code in CODES:
        st = STATEMENTS[code]
        assert licence_allowed(None, DEFAULT_ALLOW, True, st) == (
            False, "rights_statement_not_allowed")
        assert licence_allowed(None, DEFAULT_LICENCES, False, st)[0] is False


def test_allowlist_names_a_statement_exactly():
    """rs:NoC-US allows NoC-US only; InC needs its own entry; an SPDX licence still wins."""
    allow = ["CC-BY-4.0", "rs:NoC-US", "rs:NKC"]
    assert licence_allowed(None, allow, False, STATEMENTS["NoC-US"]) == (True, None)
    assert licence_allowed(None, allow, False, STATEMENTS["NKC"]) == (True, None)
    assert licence_allowed(None, allow, False, STATEMENTS["InC"])[0] is False
    assert licence_allowed(None, allow, False, STATEMENTS["InC-EDU"])[0] is False
    assert licence_allowed(None, [*allow, "rs:InC-EDU"], False, STATEMENTS["InC-EDU"])[0]
    assert licence_allowed("CC-BY-4.0", allow, False, None) == (True, None)


def test_allowlist_entry_check_names_the_right_spelling():
    """A wrong rs: entry says which statement was meant; a right one has no problem."""
    assert allow_entry_problem("rs:NoC-US") is None
    problem = allow_entry_problem("rs:noc-us")
    assert problem is not None and '"rs:NoC-US"' in problem
    assert "not a RightsStatements.org statement" in (allow_entry_problem("rs:Free") or "")


def test_statement_links_are_the_published_ones():
    """The vocab URI and the English page link follow the published patterns."""
    st = STATEMENTS["NoC-US"]
    assert st.vocab_url == "http://rightsstatements.org/vocab/NoC-US/1.0/"
    assert st.page_url == "http://rightsstatements.org/page/NoC-US/1.0/?language=en"
    assert st.in_copyright is False and STATEMENTS["InC-RUU"].in_copyright is True


def test_recipe_allowlist_accepts_statements_and_refuses_misspelt_ones():
    """licences.allow takes rs:<id> next to SPDX ids; a misspelt id is a recipe problem."""
    from pathlib import Path

    from collector.config.recipe import parse_recipe
    from collector.errors import RecipeError

    good = 'contact = "curator@example.org"\n[licences]\nallow = ["CC-BY-4.0", "rs:NoC-US"]\n'
    assert parse_recipe(good, Path("recipe.toml")).licences.allow == ["CC-BY-4.0", "rs:NoC-US"]
    with pytest.raises(RecipeError) as caught:
        parse_recipe(good.replace("rs:NoC-US", "rs:NoC-USA"), Path("recipe.toml"))
    assert "licences.allow" in str(caught.value.problems[0])
    assert "not a RightsStatements.org statement" in str(caught.value.problems[0])


def test_statements_are_counted_as_rs_keys_and_old_ledgers_still_read(tmp_path):
    """The status counts name a statement as rs:<id>; a ledger without the column (schema 3,
    opened read-only, so not migrated) still answers, counting it unknown."""
    from collector.storage import queries
    from collector.storage.ledger import Ledger

    with Ledger.create(tmp_path / "l.sqlite") as ledger:
        source = ledger.source_id("museum", "iiif", {})
        ledger.add_item(source, "c1", {"state": "stored", "rights_statement": "NoC-US"})
        ledger.add_item(source, "c2", {"state": "stored", "spdx_id": "CC0-1.0"})
        assert dict(queries.ledger_totals(ledger).licences) == {"rs:NoC-US": 1, "CC0-1.0": 1}
        ledger.rows("ALTER TABLE items DROP COLUMN rights_statement")
        assert dict(queries.ledger_totals(ledger).licences) == {"unknown": 1, "CC0-1.0": 1}
