"""HTML pieces shared by the kit's reports: tagged numbers, intervals, tables, embedded images, the page.

Every figure taken from a result dictionary is written as
``<span data-metric="dotted.path" data-value="exact value">shown value</span>``, so
a reader (or a test) can check each shown number against the JSON file it came from.
"""

from __future__ import annotations

import base64
import html
from pathlib import Path
from typing import Any

__all__ = ["img_tag", "metric", "interval", "esc", "page", "METHOD_NAMES", "get_path"]


def img_tag(path: Path, alt: str) -> str:
    if not path.exists():
        return ""
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return f'<img src="data:image/png;base64,{data}" alt="{html.escape(alt)}">'


def get_path(result: dict, dotted: str) -> Any:
    node: Any = result
    for part in dotted.split("."):
        node = node[int(part)] if isinstance(node, list) else node[part]
    return node


def metric(result: dict, dotted: str, fmt: str = ".3f") -> str:
    """A number from metrics.json, shown with ``fmt`` and tagged with its path and value."""
    val = get_path(result, dotted)
    if val is None:
        return f'<span class="na" data-metric="{dotted}" data-value="null">n/a</span>'
    shown = format(val, fmt) if isinstance(val, float) else str(val)
    return f'<span data-metric="{dotted}" data-value="{val!r}">{shown}</span>'


def interval(result: dict, low: str, high: str) -> str:
    if get_path(result, low) is None:
        return "n/a (no patches)"
    return f"{metric(result, low)}&ndash;{metric(result, high)}"


def esc(x: Any) -> str:
    return html.escape(str(x))


METHOD_NAMES = {"wilson": "Wilson score", "clopper-pearson": "Clopper-Pearson exact"}


_CSS = """<style>
body { font-family: system-ui, sans-serif; max-width: 1100px; margin: 2em auto; padding: 0 1em;
  color: #222; line-height: 1.45; }
h1 { font-size: 1.6em; margin-bottom: .2em; } h2 { margin-top: 1.8em; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; margin: .8em 0; }
td, th { border: 1px solid #bbb; padding: 3px 9px; text-align: right; vertical-align: top; }
th { background: #eef2f5; } td:first-child, th:first-child, th.rowh { text-align: left; }
table.kv th { text-align: left; white-space: nowrap; } table.kv td { text-align: left; }
.caution { border-left: 6px solid #c2410c; background: #fff4ec; padding: .8em 1em; }
.verdict { font-size: 1.15em; font-weight: 600; padding: .6em 1em; }
.pass { background: #e6f4ea; } .fail { background: #fde8e8; }
.none { background: #f3f3f3; font-weight: normal; font-size: 1em; }
.headline { font-size: 1.15em; } .dim, .na { color: #777; }
tr.weak td { background: #fff1f0; }
img { max-width: 100%; border: 1px solid #ddd; margin: .5em 0; }
code { font-size: .92em; }
</style>"""


def page(title: str, body: str) -> str:
    """A complete self-contained HTML page (no script) with the kit's report style."""
    return (
        f'<!doctype html>\n<html lang="en"><head><meta charset="utf-8">\n<title>{esc(title)}</title>\n'
        f"{_CSS}</head><body>\n{body}\n</body></html>\n"
    )
