"""Spellings: normalisation of typed terms and their symbol sequences.

A word type is the NFC, lower-cased spelling with its marks. The spelling
encoder reads the NFD form: base letters and combining marks are separate
symbols, so tone and length marks count, and a query typed without them still
reads as the same letters.
"""

from __future__ import annotations

import unicodedata

from . import TrawlError


def word_type(text: str) -> str:
    """The word type of a spelling: NFC, lower case, surrounding space removed."""
    return unicodedata.normalize("NFC", text.strip().lower())


def strip_marks(text: str) -> str:
    """The spelling without combining marks (tone, length accents), in NFC."""
    nfd = unicodedata.normalize("NFD", text)
    return unicodedata.normalize("NFC", "".join(c for c in nfd if not unicodedata.combining(c)))


def letters(text: str) -> list[str]:
    """Base letters of a spelling: after NFD, combining marks removed, letters only."""
    nfd = unicodedata.normalize("NFD", text.lower())
    return [c for c in nfd if not unicodedata.combining(c) and c.isalpha()]


def letter_count(text: str) -> int:
    return len(letters(text))


def symbols(text: str) -> list[str]:
    """Symbols the spelling encoder reads: NFD letters and combining marks, in order.

    Apostrophes and hyphens inside a word are kept as symbols; other characters
    (digits, punctuation, spaces) are dropped. A term of several words keeps a
    single space between them.
    """
    nfd = unicodedata.normalize("NFD", word_type(text))
    out: list[str] = []
    for c in nfd:
        if c.isalpha() or unicodedata.combining(c):
            out.append(c)
        elif c in "'-\u2019" and out:
            out.append("'" if c == "\u2019" else c)
        elif c.isspace() and out and out[-1] != " ":
            out.append(" ")
    while out and out[-1] in " '-":
        out.pop()
    return out


def check_term(text: str) -> str:
    """The normalised term, or a TrawlError when it holds no letters."""
    if not letters(text):
        raise TrawlError(f"the term {text!r} has no letters to search for")
    return word_type(text)
