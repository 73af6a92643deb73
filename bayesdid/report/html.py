"""The single-file HTML report of a run folder.

``write_report(run_dir)`` reads the files a run leaves behind and writes ``run_dir/report.html``:
one self-contained page (inline CSS, figures as ``data:`` SVG images, no script, no external
fetch; a Content-Security-Policy forbids both) that prints to PDF. It computes no statistics: every
number comes from the run folder.

Inputs (each optional part that is absent gets a section saying so and naming the command that
produces it; no section disappears):

* ``summary.json`` (required) and ``manifest.json`` (written by ``bayesdid fit``);
* ``posterior.nc`` (ArviZ DataTree): draws of the effect, for the density figure only;
* ``checks/checks.json`` with sections ``event_time``, ``pretrend``, ``placebo_time``,
  ``comparison``, ``placebo_space`` (each with ``status`` and ``reason``) and CSV tables beside it;
* ``summary.json["sensitivity"]`` (power-scaling) and ``sweep/verdict.json`` (variant intervals).

Every string that comes from the data or the study file is HTML-escaped. The page is put together
here; each section's renderer lives in :mod:`bayesdid.report.sections`, the shared pieces in
:mod:`bayesdid.report.pieces`, and the run folder is read through :mod:`bayesdid.report.reader`.
"""

from __future__ import annotations

from pathlib import Path

from ..outputs import atomic_write
from . import plots
from .pieces import _CSS, esc
from .reader import RunFolder
from .sections.checks import _comparison_section, _event_time_section, _placebo_section, _pretrend_section
from .sections.crosscheck import _crosscheck_section
from .sections.data import _data_section
from .sections.effect import _effect_section
from .sections.fit import _assumptions_section, _diagnostics_section, _priors_section, _provenance_section
from .sections.sensitivity import _sensitivity_section
from .words import check_flags, evidence, headline_of

__all__ = ["SECTIONS", "HEADINGS", "RunFolder", "render_report", "write_report"]

#: (anchor id, heading) of every section, in page order. Each is always present.
SECTIONS = [
    ("effect", "The effect of the policy"),
    ("event-time", "Effects by event time"),
    ("pretrend", "Pre-trend check"),
    ("comparison", "Comparison jurisdictions"),
    ("placebo", "Placebo checks"),
    ("sensitivity", "Prior and specification sensitivity"),
    ("cross-check", "Least-squares cross-check"),
    ("data", "The data"),
    ("priors", "Priors used"),
    ("diagnostics", "Sampler diagnostics"),
    ("assumptions", "Assumptions and cautions"),
    ("provenance", "How this report was made"),
]

#: Every heading on the page, the headline first.
HEADINGS = [("headline", "What happened"), *SECTIONS]


_SECTION_FUNCS = {
    "effect": _effect_section,
    "event-time": _event_time_section,
    "pretrend": _pretrend_section,
    "comparison": _comparison_section,
    "placebo": _placebo_section,
    "sensitivity": _sensitivity_section,
    "cross-check": _crosscheck_section,
    "data": _data_section,
    "priors": _priors_section,
    "diagnostics": _diagnostics_section,
    "assumptions": _assumptions_section,
    "provenance": _provenance_section,
}


def render_report(run_dir: str | Path) -> str:
    """The report of ``run_dir`` as HTML text (see the module docstring for what it reads)."""
    run = RunFolder(run_dir)
    s = run.summary
    text = headline_of(
        s,
        (run.manifest or {}).get("study"),
        flags=check_flags(run.checks, s.get("sensitivity"), s.get("parallel_trends")),
    )
    reading = evidence(s)
    title = s.get("title") or "bayesdid run"
    parts = []
    with run:  # posterior.nc is opened once, for every figure that reads it, and closed here
        for anchor, heading in SECTIONS:
            plots.in_section(anchor)
            try:
                body = _SECTION_FUNCS[anchor](run)
            except Exception as exc:  # noqa: BLE001 - a section that cannot be drawn says why, never vanishes
                body = (
                    f'<p class="absent"><strong>This section could not be drawn</strong> from the files in the '
                    f"run folder: {esc(type(exc).__name__)}: {esc(exc)}</p>"
                )
            parts.append(f'<section id="{anchor}"><h2>{esc(heading)}</h2>\n{body}\n</section>')
    toc = "".join(f'<li><a href="#{a}">{esc(h)}</a></li>' for a, h in SECTIONS)
    design = s["data"].get("design", "")
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta http-equiv="Content-Security-Policy" content="default-src 'none'; img-src data:; style-src 'unsafe-inline'">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{esc(title)} — bayesdid report</title>
<style>{_CSS}</style>
</head>
<body>
<main>
<h1>{esc(title)}</h1>
<p class="sub">Bayesian {esc(design)} analysis by bayesdid · {esc((run.manifest or {}).get("created", ""))}</p>
<section id="headline"><h2>What happened</h2>
<p class="headline {reading}">{esc(text)}</p>
</section>
<nav><ol>{toc}</ol></nav>
{chr(10).join(parts)}
</main>
</body>
</html>
"""


def write_report(run_dir: str | Path, out: str | Path | None = None) -> Path:
    """Write the report to ``out`` (default ``run_dir/report.html``) atomically; returns its path.

    Raises
    ------
    ReportError
        The run folder is missing, or lacks a readable summary.json; nothing is written.
    """
    text = render_report(run_dir)
    target = Path(out) if out is not None else Path(run_dir) / "report.html"
    return atomic_write(target, text)  # also removes what a report killed while it was written left
