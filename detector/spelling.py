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


def transliterate(text: str, readable: set[str]) -> str:
    """The spelling with every letter the model cannot read written in Latin letters.

    A character is kept when its base letter (after NFD) is one of `readable` (the model's
    symbols) or when it is no letter at all; any other letter (Cyrillic, Hebrew, Han, Ethiopic,
    Arabic, ...), with its marks, is replaced by its transliteration from the `anyascii`
    library, lower-cased. Combining marks the model does not read are dropped. Returns NFC.
    """
    from anyascii import anyascii

    out: list[str] = []
    for ch in unicodedata.normalize("NFC", text):
        nfd = unicodedata.normalize("NFD", ch)
        base = nfd[0]
        if unicodedata.combining(base):
            out.append(ch if base in readable else "")
        elif not base.isalpha() or base.lower() in readable:
            out.append(ch)
        else:
            out.append(anyascii(ch).lower())
    return unicodedata.normalize("NFC", "".join(out))


def readable_term(text: str, readable: set[str]) -> str:
    """The term as the model will read it (transliterated), or a TrawlError when no letter is left."""
    spelled = transliterate(check_term(text), readable)
    if not any(c in readable for c in letters(spelled)):
        raise TrawlError(f"the term {text!r} has no letters the model can read, even written in Latin letters")
    return spelled
