"""Pieces of the HTML report shared by every section and page: escaping, images, tables, badges, numbers, the style sheet."""

from __future__ import annotations

import base64
import html
import math

import numpy as np

from .reader import RunFolder


def esc(v) -> str:
    """HTML-escape any value's text (quotes too, so it is safe inside attributes)."""
    return html.escape(str(v), quote=True)


# ----------------------------------------------------------------------------------------- pieces


def _img(svg: str, alt: str) -> str:
    data = base64.b64encode(svg.encode("utf-8")).decode("ascii")
    return f'<figure><img src="data:image/svg+xml;base64,{data}" alt="{esc(alt)}"></figure>'


def _absent(what: str, command: str) -> str:
    return (
        f'<p class="absent"><strong>Not available in this run folder:</strong> {esc(what)} '
        f"Produce it with <code>{esc(command)}</code>.</p>"
    )


def _table(header: list[str], rows: list[list], cls: str = "") -> str:
    h = "".join(f"<th>{esc(c)}</th>" for c in header)
    body = "".join(
        "<tr>" + "".join(f"<td>{c if isinstance(c, _Raw) else esc(c)}</td>" for c in r) + "</tr>" for r in rows
    )
    return f'<table class="{cls}"><thead><tr>{h}</tr></thead><tbody>{body}</tbody></table>'


class _Raw(str):
    """Markup built here from escaped parts (not re-escaped in a table cell)."""


def _badge(status: str) -> _Raw:
    s = str(status).lower()
    cls = {"ok": "pass", "pass": "pass", "flag": "fail", "fail": "fail", "failed": "fail"}.get(s, "na")
    return _Raw(f'<span class="badge {cls}">{esc(status)}</span>')


def _num(v, digits: int = 3) -> str:
    if v is None:
        return "—"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, (int, np.integer)):
        return f"{int(v):,}"
    if isinstance(v, (float, np.floating)):
        if not math.isfinite(v):
            return "—"
        return f"{v:.{digits}g}" if abs(v) < 1e5 else f"{v:,.0f}"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_num(x, digits) for x in v) + "]"
    return str(v)


def _pct(v) -> str:
    return "—" if v is None else f"{v * 100:+.1f}%"


def _is_percent(summary) -> bool:
    return "effect_percent" in summary


def _model_scale(run: RunFolder) -> str:
    m = run.summary.get("model") or {}
    if run.family.link_label:
        return run.family.link_label
    return "log outcome" if m.get("log_outcome") else "outcome units"


_CSS = """
:root { --ink:#1d232a; --muted:#5d6670; --line:#d5dae0; --pass:#1f5f8b; --fail:#8e2f6f; --na:#5d6670;
        --warn-bg:#f7eee2; --warn:#8a4f0c; }
* { box-sizing: border-box; }
body { font: 15px/1.5 "DejaVu Sans", "Liberation Sans", Arial, sans-serif; color: var(--ink); margin: 0;
       background: #fff; }
main { max-width: 980px; margin: 0 auto; padding: 28px 32px 60px; }
h1 { font-size: 26px; margin: 0 0 4px; }
h2 { font-size: 20px; margin: 34px 0 10px; padding-top: 10px; border-top: 2px solid var(--line); }
h3 { font-size: 16px; margin: 20px 0 6px; }
.sub { color: var(--muted); margin: 0 0 16px; }
.headline { font-size: 18px; line-height: 1.55; padding: 14px 18px; border-left: 6px solid var(--pass);
            background: #eef4f9; margin: 12px 0; }
.headline.unreliable { border-color: var(--fail); background: #f6ecf2; }
.headline.null { border-color: var(--na); background: #f1f2f4; }
nav ol { columns: 2; font-size: 14px; color: var(--muted); }
nav a { color: var(--pass); }
figure { margin: 10px 0 4px; }
figure img { width: 100%; max-width: 780px; height: auto; display: block; }
.caption { color: var(--muted); font-size: 13px; margin-top: 2px; }
table { border-collapse: collapse; margin: 8px 0 12px; font-size: 14px; width: 100%; }
table.compact { width: auto; }
th, td { text-align: left; padding: 4px 10px 4px 0; border-bottom: 1px solid var(--line); vertical-align: top; }
th { color: var(--muted); font-weight: 600; }
td { word-break: break-word; }
.badge { display: inline-block; padding: 0 8px; border-radius: 9px; font-size: 13px; font-weight: 700;
         color: #fff; background: var(--na); }
.badge.pass { background: var(--pass); }
.badge.fail { background: var(--fail); }
.absent { background: var(--warn-bg); color: var(--warn); padding: 8px 12px; border-radius: 4px; }
.note { color: var(--muted); font-size: 14px; }
.caution { border: 1px solid var(--line); padding: 10px 14px; }
code { font-size: 13px; background: #f1f2f4; padding: 1px 4px; word-break: break-word; }
@page { margin: 16mm 14mm; }
@media print {
  body { font-size: 11pt; }
  main { max-width: none; padding: 0; }
  nav { display: none; }
  h2 { break-after: avoid; }
  figure, table, .headline { break-inside: avoid; }
  .headline, .badge, .absent { -webkit-print-color-adjust: exact; print-color-adjust: exact; }
}
"""
