"""The demo archive's reservations against text-and-data mining: the pieces the demo host,
the hostile archive and the tests share. Invented data; standard library only.

- :func:`xmp_packet`: an XMP packet carrying IPTC Photo Metadata 2023.1 "Data Mining"
  (``plus:DataMining``, namespace ``http://ns.useplus.org/ldf/xmp/1.0/``, a value of the PLUS
  Data Mining vocabulary ``http://ns.useplus.org/ldf/vocab/DMI-...``) and "Other Constraints".
"""

from __future__ import annotations

PLUS_VOCAB = "http://ns.useplus.org/ldf/vocab/"


def xmp_packet(term: str, constraint: str = "Ask the archive first") -> bytes:
    """An XMP packet whose plus:DataMining is ``PLUS_VOCAB + term`` (a full URI is kept as
    given) and whose plus:OtherConstraints is ``constraint``."""
    value = term if term.startswith("http") else PLUS_VOCAB + term
    return ("<?xpacket begin='' id='W5M0MpCehiHzreSzNTczkc9d'?><x:xmpmeta xmlns:x='adobe:ns:"
            "meta/'><rdf:RDF xmlns:rdf='http://www.w3.org/1999/02/22-rdf-syntax-ns#'>"
            "<rdf:Description rdf:about='' xmlns:plus='http://ns.useplus.org/ldf/xmp/1.0/'>"
            f"<plus:DataMining>{value}</plus:DataMining><plus:OtherConstraints><rdf:Alt>"
            f"<rdf:li xml:lang='x-default'>{constraint}</rdf:li></rdf:Alt>"
            "</plus:OtherConstraints></rdf:Description></rdf:RDF></x:xmpmeta>"
            "<?xpacket end='w'?>").encode()
