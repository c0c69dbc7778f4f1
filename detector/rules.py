"""Respelling rules: an archivist's letter-to-letter rewrites, applied to typed terms.

A rules file is plain UTF-8 text, one rule per line::

    # comments start with '#', anywhere on a line; blank lines are ignored
    ch  -> ts        # every 'ch' becomes 'ts'
    c   -> k         # runs after the line above, so it never sees the 'c' of 'ch'
    aa  -> aː        # several letters on either side
    ^h  ->           # '^' opens the left side: only at the start of a word;
                     # an empty right side deletes the letters
    e$  -> ə         # '$' closes the left side: only at the end of a word
    ^ny$ -> nyi      # both: the whole word

The arrow is ``->`` (or ``→``). Each side is one run of characters without
spaces; ``#``, ``^`` and ``$`` cannot be letters of a rule (the spelling
encoder ignores such characters anyway). Both sides are read in NFC lower case.

Semantics
---------
- The term is put in NFC lower case (its word type) and spaces are collapsed;
  a term of several words keeps its words, and ``^``/``$`` mark the start/end
  of each word.
- Rules apply in file order. Each rule makes one pass over the current text,
  left to right, rewriting every non-overlapping match; the result is
  re-normalised to NFC and handed to the next rule. A rule never re-reads what
  it wrote, so no rule can loop: ``a -> aa`` turns ``bana`` into ``baanaa``,
  once. A later rule does see what earlier rules wrote (rule 1 feeds rule 2).
- Matching is on NFC code points, whole letters only: a match never begins or
  ends between a letter and a combining mark of it. So a rule for ``é``
  matches ``é`` typed as one code point or as ``e`` + U+0301, and a rule for
  ``e`` does not touch ``é`` (write a second rule for ``é`` if it should), nor
  does a rule for ``ɛ`` touch ``ɛ́`` (which has no precomposed form).

Errors (``TrawlError``, naming the file and line): a line without exactly one
arrow, an empty left side, a space inside a side, ``^``/``$`` anywhere but the
two ends of the left side, a left side that starts with a combining mark (it
could never match a whole letter), a rule that rewrites something to itself,
a whole-word rule (``^…$``) that deletes the word, and a rule set that deletes
every letter of a probe word made of the Latin alphabet and every letter the
rules mention. Applying rules to a term raises when a rule removes the term's
last letter, or makes it grow past ``max(64, 8 × its length)`` characters (only
a pathological rule set does that), naming that rule's line.
"""

from __future__ import annotations

import hashlib
import re
import unicodedata
from dataclasses import dataclass
from pathlib import Path

from . import TrawlError
from .spelling import letters, word_type

ARROW = re.compile(r"->|→")
PROBE_ALPHABET = "abcdefghijklmnopqrstuvwxyz"


def _nfc_lower(text: str) -> str:
    return unicodedata.normalize("NFC", text.lower())


def _collapse(text: str) -> str:
    return " ".join(text.split())


@dataclass(frozen=True)
class Rule:
    """One rewrite: ``left`` (NFC, lower case, without anchors) becomes ``right``."""

    left: str
    right: str
    at_start: bool = False  # '^': the match must begin a word
    at_end: bool = False  # '$': the match must end a word
    line: int = 0  # line number in its file, 1-based (0: not from a file)

    @property
    def pattern(self) -> str:
        """The left side as written in a rules file, anchors included."""
        return ("^" if self.at_start else "") + self.left + ("$" if self.at_end else "")

    def to_text(self) -> str:
        return f"{self.pattern} -> {self.right}".rstrip()

    def _matches_at(self, text: str, i: int) -> bool:
        j = i + len(self.left)
        if not text.startswith(self.left, i):
            return False
        if j < len(text) and unicodedata.combining(text[j]):
            return False  # the match would end inside a letter
        if self.at_start and i > 0 and not text[i - 1].isspace():
            return False
        if self.at_end and j < len(text) and not text[j].isspace():
            return False
        return True

    def rewrite(self, text: str) -> str:
        """One left-to-right pass over NFC ``text``, rewriting non-overlapping matches."""
        out: list[str] = []
        i = 0
        while i < len(text):
            if self._matches_at(text, i):
                out.append(self.right)
                i += len(self.left)
            else:
                out.append(text[i])
                i += 1
        return unicodedata.normalize("NFC", "".join(out))


@dataclass(frozen=True)
class Step:
    """A rule that changed the term while it was applied: the text before and after it."""

    line: int
    rule: str
    before: str
    after: str


@dataclass(frozen=True)
class RuleSet:
    """Ordered respelling rules, read from ``source`` (a file name, for messages)."""

    rules: tuple[Rule, ...] = ()
    source: str = "rules"

    def __len__(self) -> int:
        return len(self.rules)

    def _where(self, rule: Rule) -> str:
        return f"{self.source}, line {rule.line}"

    def _run(self, text: str) -> tuple[list[Step], tuple[Rule, str, str] | None]:
        """Apply the rules to normalised ``text``: the steps, and the first failure if any.

        A failure is (rule, "empty" or "long", the text the rule produced).
        """
        limit = max(64, 8 * len(text))
        steps: list[Step] = []
        for rule in self.rules:
            new = _collapse(rule.rewrite(text))
            if new == text:
                continue
            if not letters(new):
                return steps, (rule, "empty", new)
            if len(new) > limit:
                return steps, (rule, "long", new)
            steps.append(Step(rule.line, rule.to_text(), text, new))
            text = new
        return steps, None

    def trace(self, word: str) -> list[Step]:
        """The rules that change ``word``, in order, with the text before and after each.

        Raises TrawlError when ``word`` has no letters, when a rule removes its
        last letter, or when a rule makes it grow past ``max(64, 8 × its length)``.
        """
        text = _collapse(word_type(word))
        if not letters(text):
            raise TrawlError(f"the term {word!r} has no letters to search for")
        steps, failure = self._run(text)
        if failure is not None:
            rule, kind, new = failure
            before = steps[-1].after if steps else text
            if kind == "empty":
                raise TrawlError(
                    f"{self._where(rule)}: the rule '{rule.to_text()}' leaves the term "
                    f"{word!r} without letters ({before!r} became {new!r})"
                )
            raise TrawlError(
                f"{self._where(rule)}: the rule '{rule.to_text()}' makes the term {word!r} "
                f"grow past {max(64, 8 * len(text))} characters; check the rules that lengthen words"
            )
        return steps

    def apply(self, word: str) -> str:
        """The respelled term: NFC lower case, single spaces between words."""
        steps = self.trace(word)
        return steps[-1].after if steps else _collapse(word_type(word))

    def apply_or_keep(self, word: str) -> str:
        """`apply`, or `word` unchanged when a rule would leave it without letters or blow it up
        (learned rules: a rule fitted on other terms must not make a term unsearchable)."""
        try:
            return self.apply(word)
        except TrawlError:
            return word

    def to_text(self) -> str:
        """Canonical rules text (no comments): one rule per line; parses back to equal rules."""
        return "".join(rule.to_text() + "\n" for rule in self.rules)

    def digest(self) -> str:
        """SHA-256 of the canonical text: comments, spacing and line numbers do not count."""
        return hashlib.sha256(self.to_text().encode("utf-8")).hexdigest()


def _parse_line(body: str, where: str, lineno: int) -> Rule:
    parts = ARROW.split(body)
    if len(parts) == 1:
        raise TrawlError(f"{where}: expected a rule 'LEFT -> RIGHT', found {body!r}")
    if len(parts) > 2:
        raise TrawlError(f"{where}: a rule has one arrow '->', this line has {len(parts) - 1}")
    left, right = (_nfc_lower(p.strip()) for p in parts)
    for side, name in ((left, "left"), (right, "right")):
        if any(c.isspace() for c in side):
            raise TrawlError(
                f"{where}: the {name} side {side!r} contains a space; a rule rewrites letters within a word"
            )
    at_start = left.startswith("^")
    at_end = left.endswith("$") and len(left) > int(at_start)
    core = left[int(at_start) : len(left) - int(at_end)]
    if not core:
        raise TrawlError(f"{where}: the left side of the rule is empty; write the letters to rewrite")
    if "^" in core or "$" in core:
        raise TrawlError(
            f"{where}: '^' may only open the left side and '$' only close it (in {left!r})"
        )
    if "^" in right or "$" in right:
        raise TrawlError(f"{where}: '^' and '$' mark word edges on the left side only, not in {right!r}")
    if unicodedata.combining(core[0]):
        raise TrawlError(
            f"{where}: the left side {left!r} starts with a combining mark; "
            "write the letter together with its mark"
        )
    if core == right:
        raise TrawlError(f"{where}: the rule rewrites {core!r} to itself")
    if at_start and at_end and not letters(right):
        raise TrawlError(f"{where}: the rule deletes the whole word {core!r}")
    return Rule(core, right, at_start, at_end, lineno)


def parse_rules(text: str, source: str = "rules") -> RuleSet:
    """Parse rules text (see the module documentation); ``source`` names it in messages."""
    rules: list[Rule] = []
    for lineno, raw in enumerate(text.lstrip("\ufeff").splitlines(), start=1):
        body = raw.split("#", 1)[0].strip()
        if body:
            rules.append(_parse_line(body, f"{source}, line {lineno}", lineno))
    ruleset = RuleSet(tuple(rules), source)
    if rules:
        # A word made of the Latin alphabet and every letter the rules mention: rules that
        # leave no letter of it, or blow it up, would do the same to almost any term.
        probe = _collapse(unicodedata.normalize("NFC", PROBE_ALPHABET + "".join(r.left for r in rules)))
        _, failure = ruleset._run(probe)
        if failure is not None:
            rule, kind, _ = failure
            what = (
                "no letter is left of a word made of every letter"
                if kind == "empty"
                else f"a word made of every letter grows past {max(64, 8 * len(probe))} characters"
            )
            raise TrawlError(
                f"{ruleset._where(rule)}: after the rule '{rule.to_text()}', {what}; "
                "these rules would leave almost any term unusable"
            )
    return ruleset


def load_rules(path: str | Path) -> RuleSet:
    """Read and parse a UTF-8 rules file; messages name the file."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise TrawlError(f"rules file {str(p)!r} not found") from None
    except UnicodeDecodeError as exc:
        line = p.read_bytes()[: exc.start].count(b"\n") + 1
        raise TrawlError(f"{p}, line {line}: the rules file is not UTF-8 text") from None
    except OSError as exc:
        raise TrawlError(f"cannot read rules file {str(p)!r}: {exc.strerror}") from None
    return parse_rules(text, source=str(p))
