"""The pieces of every HTML report page (``linz logs``, ``linz campaign``): one look, a page
that fits the width of any screen, tables of text and PNG plots embedded inline."""

from __future__ import annotations

import base64
import html
from pathlib import Path
from typing import Sequence

__all__ = ["page", "html_table", "embedded_image"]

PAGE_STYLE = ("body{font-family:sans-serif;max-width:1000px;margin:1em auto;padding:0 1em}"
              "table{border-collapse:collapse;font-size:0.9em;display:block;max-width:100%;overflow-x:auto}"
              "td,th{border:1px solid #ccc;padding:2px 6px;overflow-wrap:anywhere}"
              "pre{background:#f6f6f6;padding:1em;white-space:pre-wrap;overflow-wrap:anywhere}"
              "img{max-width:100%;height:auto}.bad{color:#c00}")


def page(title: str, heading: str, parts: Sequence[str], heading_class: str = "") -> str:
    """A whole HTML page.

    Parameters
    ----------
    title, heading : str
        Plain text (escaped here).
    parts : sequence of str
        HTML of the body, in order.
    heading_class : str
        ``bad`` draws the heading in red (a run or campaign that did not go well).

    Returns
    -------
    str
    """
    css = f" class='{heading_class}'" if heading_class else ""
    head = ["<!DOCTYPE html>", "<html><head><meta charset='utf-8'>",
            "<meta name='viewport' content='width=device-width, initial-scale=1'>",
            f"<title>{html.escape(title)}</title>", f"<style>{PAGE_STYLE}</style></head><body>",
            f"<h1{css}>{html.escape(heading)}</h1>"]
    return "\n".join([*head, *parts, "</body></html>"]) + "\n"


def html_table(title: str, head: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    """A titled table of text cells (``none`` when there are no rows).

    Parameters
    ----------
    title : str
    head : sequence of str
    rows : sequence of sequence of str

    Returns
    -------
    str
        HTML.
    """
    if not rows:
        return f"<h2>{html.escape(title)}</h2><p>none</p>"
    cells = "".join(f"<th>{html.escape(h)}</th>" for h in head)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in row) + "</tr>" for row in rows)
    return f"<h2>{html.escape(title)}</h2><table><tr>{cells}</tr>{body}</table>"


def embedded_image(path: str | Path) -> str:
    """A PNG file inline (a data URI), under a heading named after the file.

    Parameters
    ----------
    path : str or pathlib.Path

    Returns
    -------
    str
        HTML.
    """
    path = Path(path)
    data = base64.b64encode(path.read_bytes()).decode()
    return (f"<h2>{html.escape(path.stem.replace('_', ' '))}</h2>"
            f"<img alt='{html.escape(path.stem)}' src='data:image/png;base64,{data}'>")
