"""The report page: one self-contained HTML file (figures embedded) and metrics.json.

A plain engineering page of our own design: a header with the inputs, their checksums,
the method and the cautions, then one section per check.
"""

from __future__ import annotations

import base64
import html
import json
import math
from pathlib import Path

from ..about import CAUTION
from ..io.writing import atomic_write
from .figures import png_bytes

STYLE = """
body { font-family: Helvetica, Arial, sans-serif; margin: 2em auto; max-width: 70em; color: #1d1d1d;
       line-height: 1.4; padding: 0 1em; }
h1 { font-size: 1.6em; border-bottom: 2px solid #444; padding-bottom: 0.2em; }
h2 { font-size: 1.25em; margin-top: 2em; border-bottom: 1px solid #bbb; }
table { border-collapse: collapse; margin: 0.8em 0; font-size: 0.92em; }
th, td { border: 1px solid #c8c8c8; padding: 0.25em 0.6em; text-align: right; }
th { background: #efefef; } td.text, th.text { text-align: left; }
.caution { border: 2px solid #a86200; background: #fff6e8; padding: 0.7em 1em; margin: 1em 0; }
figure { margin: 1em 0; } figure img { max-width: 100%; border: 1px solid #ddd; }
figcaption { font-size: 0.9em; color: #444; }
code { font-size: 0.95em; }
"""


def _cell(value) -> str:
    if value is None:
        return "–"
    if isinstance(value, float):
        if math.isnan(value):
            return "–"
        return f"{value:.4g}"
    return html.escape(str(value))


def table(header: list[str], rows: list[list], text_columns: int = 1) -> str:
    """An HTML table; the first ``text_columns`` columns are left-aligned."""
    head = "".join(f"<th class='text'>{html.escape(h)}</th>" if i < text_columns else f"<th>{html.escape(h)}</th>"
                   for i, h in enumerate(header))
    body = "".join("<tr>" + "".join(f"<td class='text'>{_cell(v)}</td>" if i < text_columns else f"<td>{_cell(v)}</td>"
                                    for i, v in enumerate(row)) + "</tr>" for row in rows)
    return f"<table><tr>{head}</tr>{body}</table>"


def figure_html(figure, caption: str) -> str:
    data = base64.b64encode(png_bytes(figure)).decode("ascii")
    return (f"<figure><img alt='{html.escape(caption)}' src='data:image/png;base64,{data}'>"
            f"<figcaption>{html.escape(caption)}</figcaption></figure>")


def page(title: str, sections: list[tuple[str, str]], header_html: str) -> str:
    body = "".join(f"<h2>{html.escape(name)}</h2>{content}" for name, content in sections)
    return (f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{html.escape(title)}</title>"
            f"<style>{STYLE}</style></head><body><h1>{html.escape(title)}</h1>{header_html}"
            f"<div class='caution'><strong>Caution.</strong> {html.escape(CAUTION)}</div>{body}</body></html>")


def _json_ready(value):
    """Plain Python values with NaN and infinities as None, so that metrics.json is strict JSON."""
    if hasattr(value, "tolist"):  # numpy arrays and scalars
        value = value.tolist()
    if isinstance(value, dict):
        return {str(k): _json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_ready(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def write_report(folder: str | Path, title: str, header_html: str, sections: list[tuple[str, str]],
                 metrics: dict) -> dict[str, Path]:
    """Write ``index.html`` and ``metrics.json`` into ``folder`` (each atomically)."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    text = json.dumps(_json_ready(metrics), indent=2, allow_nan=False)
    paths = {"metrics": folder / "metrics.json", "html": folder / "index.html"}
    atomic_write(paths["metrics"], lambda tmp: Path(tmp).write_text(text + "\n"))
    document = page(title, sections, header_html)
    atomic_write(paths["html"], lambda tmp: Path(tmp).write_text(document, encoding="utf-8"))
    return paths
