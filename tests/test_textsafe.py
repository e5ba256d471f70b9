"""Text from users made safe: job-name tokens, CSV formula cells, Markdown escaping.

CSV: OWASP, "CSV Injection" guidance (as listed in the project's references): cells
beginning with ``=``, ``+``, ``-``, ``@``, tab (0x09) or carriage return (0x0D) are read
as formulas by spreadsheet programs; a leading single quote makes them text. The
apostrophe rule is common practice, not a standard.
"""

from __future__ import annotations

import csv
import io

import pytest

from trainkit.core.textsafe import (
    FORMULA_STARTS,
    TOKEN_MAX,
    csv_cell,
    csv_uncell,
    md_code,
    md_text,
    token_problem,
)


@pytest.mark.parametrize("start", ["=", "+", "-", "@", "\t", "\r"])
def test_formula_starts_of_the_owasp_guidance_get_an_apostrophe(start):
    assert set(FORMULA_STARTS) == {"=", "+", "-", "@", "\t", "\r"}
    text = f"{start}cmd|' /C calc'!A0"
    assert csv_cell(text) == "'" + text
    assert csv_uncell(csv_cell(text)) == text


@pytest.mark.parametrize("text", ["site-a/p1.jpg", "'quoted", "''", "", "plain", "a=b"])
def test_every_text_reads_back_exactly_through_a_csv_file(text):
    buf = io.StringIO()
    csv.writer(buf).writerow([csv_cell(text), -0.5, 3])
    row = next(csv.reader(io.StringIO(buf.getvalue())))
    assert csv_uncell(row[0]) == text
    assert row[1:] == ["-0.5", "3"]  # numbers are not text cells: written as they are


def test_numbers_and_none_pass_unchanged():
    assert csv_cell(-0.5) == -0.5 and csv_cell(None) is None and csv_cell(7) == 7


@pytest.mark.parametrize(
    "name, ok",
    [("deck-7", True), ("job_2024.06", True), ("A" * TOKEN_MAX, True), ("A" * (TOKEN_MAX + 1), False),
     ("", False), ("a b", False), ("a\nb", False), ("-x", False), (".hidden", False),
     ("a/b", False), ("ä", False), ("=1+1", False)],
)  # fmt: skip
def test_job_name_tokens(name, ok):
    assert (token_problem(name) is None) == ok


def test_markdown_text_is_one_line_of_the_characters_it_holds():
    """Rendered by markdown-it-py (CommonMark), the escaped text is one paragraph whose
    visible text is the input with its line breaks as spaces."""
    from markdown_it import MarkdownIt

    md = MarkdownIt("commonmark")
    for raw in ["x\n## Verdict: ACCEPTED", "<script>alert(1)</script>", "1. a", "- b", "# c",
                "*bold* _it_ [l](http://e) `code` a|b ~~s~~ !x \\ & done", "diagonal_rising"]:  # fmt: skip
        html = md.render("Job: " + md_text(raw))
        assert html.count("<p>") == 1 and "<script" not in html and "<h" not in html
        text = md.parse("Job: " + md_text(raw))[1].children
        assert "".join(t.content for t in text if t.type == "text") == "Job: " + " ".join(
            raw.split()
        )
    assert md_text("diagonal_rising") == "diagonal_rising"  # an intraword _ is left alone


def test_markdown_code_span_cannot_be_closed_from_inside():
    from markdown_it import MarkdownIt

    md = MarkdownIt("commonmark")
    for raw in ["a`b", "``x``", "`", "<b>x</b>\n# h"]:
        tokens = md.parseInline("see " + md_code(raw))[0].children
        spans = [t for t in tokens if t.type == "code_inline"]
        assert len(spans) == 1 and spans[0].content == " ".join(raw.split())
