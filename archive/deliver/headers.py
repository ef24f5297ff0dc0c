"""80-column header records shared by the SPS and SEG-P1 writers, never cut silently.

A header record holds its id in columns 1-4, a description in 5-32 and data in 33-80. Data
longer than 48 characters is wrapped at spaces over continuation records (a word longer than
48 characters is split at column 80 and continues on the next record), so every value a
header states appears whole when the data columns of a record and its continuations are read
in order. A description or id that does not fit is a programming error and is refused.

Both formats are ASCII: :func:`ascii_text` transliterates header text (Unicode NFKD
decomposition with the combining marks dropped, so "Sà" becomes "Sa") and refuses, naming
the field, what is still not ASCII, instead of writing "?" in its place.
"""

from __future__ import annotations

import unicodedata

from archive.errors import Refused

ID_WIDTH = 4
DESC_WIDTH = 28
DATA_WIDTH = 48
CONTINUED = "(continued)"


def ascii_text(text: str, field: str) -> str:
    """``text`` as ASCII: NFKD with combining marks dropped; :class:`Refused` naming ``field``
    and the characters when some are still not ASCII."""
    if text.isascii():
        return text
    out = "".join(c for c in unicodedata.normalize("NFKD", text) if not unicodedata.combining(c))
    if out.isascii():
        return out
    bad = sorted({c for c in out if not c.isascii()})
    raise Refused(f"header field {field!r} ({text!r}) has characters with no ASCII form: "
                  + ", ".join(f"{c!r} (U+{ord(c):04X})" for c in bad),
                  hint="write that text in ASCII letters (e.g. 'O' for 'Ø'), or deliver as "
                       "CSV (--format csv), which is UTF-8")


def header_record(item: str, description: str, data: str) -> str:
    """One 80-column H record: id in 1-4, description in 5-32, data in 33-80.

    Refuses (:class:`Refused`) any part that does not fit its columns; use
    :func:`header_lines` to spread long data over continuation records.
    """
    for what, text, width in (("record id", item, ID_WIDTH),
                              ("description", description, DESC_WIDTH),
                              ("data", data, DATA_WIDTH)):
        if len(text) > width:
            raise Refused(f"header {what} {text!r} is {len(text)} characters, its field has "
                          f"{width}", hint="deliver as CSV (--format csv), which has no "
                                           "fixed-width header")
    return f"{item:<4}{description:<28}{data:<48}"


def wrap_data(data: str, width: int = DATA_WIDTH) -> list[str]:
    """Split ``data`` into pieces of at most ``width`` characters, at spaces where possible.

    Joining the pieces with single spaces gives back ``data`` with runs of spaces collapsed;
    a word longer than ``width`` is split into ``width``-character parts. Empty data gives
    one empty piece.
    """
    pieces: list[str] = []
    current = ""
    for word in data.split():
        while len(word) > width:
            if current:
                pieces.append(current)
                current = ""
            pieces.append(word[:width])
            word = word[width:]
        if not current:
            current = word
        elif len(current) + 1 + len(word) <= width:
            current = f"{current} {word}"
        else:
            pieces.append(current)
            current = word
    if current or not pieces:
        pieces.append(current)
    return pieces


def header_lines(item: str, description: str, data: str, continuation_item: str) -> list[str]:
    """The record ``item`` and as many ``continuation_item`` records as its data needs.

    Continuation records carry ``(continued)`` as their description. Non-ASCII text is
    transliterated or refused (:func:`ascii_text`).
    """
    description = ascii_text(description, description)
    pieces = wrap_data(ascii_text(data, description))
    first = header_record(item, description, pieces[0])
    return [first] + [header_record(continuation_item, CONTINUED, p) for p in pieces[1:]]
