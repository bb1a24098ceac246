"""Source notes on screen: what the sources reported while listing (a blank scan, touching
items, a selector that matched nothing, a cursor loop...), without SQL, filtered by kind and
source."""

from __future__ import annotations

from collector.errors import CollectionError
from collector.storage import upkeep_queries as uq
from collector.storage.ledger import Ledger


def list_notes(ledger: Ledger, *, kinds: tuple[str, ...] = (),
               sources: tuple[str, ...] = ()) -> list[uq.NoteRow]:
    """The notes of the chosen kinds and sources, oldest first. A kind or source that the
    ledger has never seen is an error naming the ones it has (a typo is not "no notes")."""
    known_kinds, known_sources = uq.note_kinds_and_sources(ledger)
    unknown = [k for k in kinds if k not in known_kinds]
    if unknown:
        raise CollectionError(f"no note of kind {', '.join(map(repr, unknown))}; the ledger "
                              f"has: {', '.join(known_kinds) or 'no notes at all'}")
    unknown = [s for s in sources if s not in known_sources]
    if unknown:
        raise CollectionError(f"no source named {', '.join(map(repr, unknown))}; the ledger "
                              f"has: {', '.join(known_sources) or 'no sources yet'}")
    return uq.notes(ledger, kinds=kinds, sources=sources)


def note_lines(rows: list[uq.NoteRow]) -> list[str]:
    """One line per note: time, run, source, kind, message and URL."""
    lines = []
    for n in rows:
        where = f" <{n.url}>" if n.url else ""
        lines.append(f"{(n.created_at or '?')[:19]}  run #{n.run_id or '-'}  "
                     f"{n.source or '(no source)'}  {n.kind}: {n.message}{where}")
    return lines
