"""Text from users made safe for the files the kit writes: names, CSV cells, Markdown.

Three rules, each in one place so that every writer applies the same one:

- :func:`token_problem`: a name the kit stores and prints (a job's name) is a short
  single-line token: letters, digits and ``- _ .``, starting with a letter or a digit,
  at most :data:`TOKEN_MAX` characters.
- :func:`csv_cell` / :func:`csv_uncell`: a text cell that a spreadsheet would read as a
  formula (it begins with ``= + - @``, a tab or a carriage return) is written with a
  leading apostrophe, the rule of the OWASP "CSV Injection" guidance (common practice,
  not a standard). A text cell that already begins with an apostrophe gets one more, so
  that :func:`csv_uncell` (drop one leading apostrophe) gives back every text exactly.
  Only text columns go through it: numbers such as ``-0.5`` are written as they are.
- :func:`md_text`: text printed into Markdown (a model card) keeps to one line and shows
  as the characters it holds: line breaks become spaces, ``& < >`` become HTML entities
  and Markdown's punctuation is escaped with a backslash, so no name can open a heading,
  a table cell, a link or an HTML element. :func:`md_code` puts text in a code span
  (literal in CommonMark, HTML included) on one line, fenced by more backticks than it
  holds; not for table cells, where GFM splits at ``|`` even in a code span.

Plain Python only (no numpy): the Screener's side may import it.
"""

from __future__ import annotations

import re

__all__ = [
    "TOKEN_MAX",
    "TOKEN_RULE",
    "FORMULA_STARTS",
    "token_problem",
    "csv_cell",
    "csv_uncell",
    "md_text",
    "md_code",
]

#: Longest token (a job's name) the kit accepts.
TOKEN_MAX = 64
#: The token rule in words, for error messages.
TOKEN_RULE = f"1 to {TOKEN_MAX} letters, digits, '-', '_' or '.', starting with a letter or a digit"
_TOKEN_RE = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")

#: First characters that make a spreadsheet read a cell as a formula (OWASP "CSV Injection").
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")

#: Characters with a meaning anywhere in a Markdown line (CommonMark and its GFM tables);
#: ``_`` only where it could open or close emphasis (not inside a word: ``diagonal_rising``).
_MD_INLINE = re.compile(r"([\\`*\[\]|~!]|(?<![A-Za-z0-9])_|_(?![A-Za-z0-9]))")
#: Starts of a line that open a block (heading, list, quote, setext rule).
#: (``>`` is already an entity by then.)
_MD_BLOCK_START = re.compile(r"^([#+=-]|\d+(?=[.)]))")


def token_problem(name: object) -> str | None:
    """What is wrong with ``name`` as a token (see the module docstring), or None if nothing."""
    if not isinstance(name, str):
        return f"expected text, got {type(name).__name__}"
    if not name:
        return "it is empty"
    if len(name) > TOKEN_MAX:
        return f"it has {len(name)} characters, more than {TOKEN_MAX}"
    if not _TOKEN_RE.fullmatch(name):
        return f"it must be {TOKEN_RULE}"
    return None


def csv_cell(text: object) -> object:
    """A text cell as the kit writes it to CSV (a formula-like start neutralised); other
    values (numbers, None) unchanged."""
    if isinstance(text, str) and text and (text[0] in FORMULA_STARTS or text[0] == "'"):
        return "'" + text
    return text


def csv_uncell(text: str) -> str:
    """The text a :func:`csv_cell` cell stands for (one leading apostrophe dropped)."""
    return text[1:] if text.startswith("'") else text


def md_text(text: object) -> str:
    """``text`` for a Markdown line: one line, HTML and Markdown syntax shown as characters."""
    s = " ".join(str(text).split())  # every run of whitespace, line breaks included, -> one space
    s = s.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    s = _MD_INLINE.sub(r"\\\1", s)
    return _MD_BLOCK_START.sub(lambda m: m[0] + "\\" if m[0][0].isdigit() else "\\" + m[0], s)


def md_code(text: object) -> str:
    """``text`` as a one-line Markdown code span that no character in it can close."""
    s = " ".join(str(text).split())
    runs = re.findall(r"`+", s)
    fence = "`" * (max((len(r) for r in runs), default=0) + 1)
    pad = " " if s.startswith("`") or s.endswith("`") else ""
    return f"{fence}{pad}{s}{pad}{fence}"
