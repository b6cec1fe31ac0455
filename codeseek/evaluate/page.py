"""The HTML report: a self-contained page with the table, rank histograms, recall curves."""

from __future__ import annotations

import html
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from codeseek.errors import ReportWriteError
from codeseek.evaluate.documents import WHOLE
from codeseek.evaluate.metrics import MethodResult, metric_rows, recall_at
from codeseek.evaluate.report import EvalReport

_BINS = ((1, 1, "1"), (2, 2, "2"), (3, 5, "3-5"), (6, 10, "6-10"), (11, 20, "11-20"),
         (21, 50, "21-50"), (51, 100, "51-100"))
_COLOURS = {"lexical": "#b8860b", "dense": "#1f77b4", "dense-ann": "#17becf",
            "served": "#2ca02c"}


def rank_histogram(ranks: Sequence[int]) -> list[tuple[str, int]]:
    """Counts of ranks in bins (1, 2, 3-5, ..., 51-100, and >100 for later or missed)."""
    ranks_array = np.asarray(ranks)
    bins = [(label, int(((ranks_array >= low) & (ranks_array <= high)).sum()))
            for low, high, label in _BINS]
    bins.append((">100", int(((ranks_array > 100) | (ranks_array == 0)).sum())))
    return bins


def _svg_histogram(result: MethodResult, width: int = 420, height: int = 180) -> str:
    bins = rank_histogram(result.ranks)
    top = max((count for _, count in bins), default=1) or 1
    bar = (width - 40) / len(bins)
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height + 40}" '
             f'role="img" aria-label="rank histogram of {html.escape(result.method)}">']
    for i, (label, count) in enumerate(bins):
        h = (height - 20) * count / top
        x = 30 + i * bar
        parts.append(f'<rect x="{x:.1f}" y="{height - h:.1f}" width="{bar - 4:.1f}" '
                     f'height="{h:.1f}" fill="{_COLOURS.get(result.method, "#888")}">'
                     f'<title>{html.escape(label)}: {count}</title></rect>')
        parts.append(f'<text x="{x + bar / 2 - 2:.1f}" y="{height + 14}" font-size="9" '
                     f'text-anchor="middle">{html.escape(label)}</text>')
        parts.append(f'<text x="{x + bar / 2 - 2:.1f}" y="{height - h - 3:.1f}" '
                     f'font-size="9" text-anchor="middle">{count}</text>')
    parts.append("</svg>")
    return "".join(parts)


def _svg_recall_curve(results: Sequence[MethodResult], width: int = 520,
                      height: int = 240, depth: int = 20) -> str:
    left, bottom = 40, height - 30
    scale_x = (width - left - 110) / (depth - 1)
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
             'role="img" aria-label="recall at k">',
             f'<line x1="{left}" y1="{bottom}" x2="{width - 110}" y2="{bottom}" stroke="#444"/>',
             f'<line x1="{left}" y1="10" x2="{left}" y2="{bottom}" stroke="#444"/>']
    for tick in (0.0, 0.25, 0.5, 0.75, 1.0):
        y = bottom - tick * (bottom - 10)
        parts.append(f'<text x="{left - 4}" y="{y + 3:.1f}" font-size="9" '
                     f'text-anchor="end">{tick:.2f}</text>')
    for k in (1, 5, 10, 15, 20):
        x = left + (k - 1) * scale_x
        parts.append(f'<text x="{x:.1f}" y="{bottom + 14}" font-size="9" '
                     f'text-anchor="middle">{k}</text>')
    for row, result in enumerate(results):
        colour = _COLOURS.get(result.method, "#888")
        points = " ".join(
            f"{left + (k - 1) * scale_x:.1f},"
            f"{bottom - recall_at(np.asarray(result.ranks), k) * (bottom - 10):.1f}"
            for k in range(1, depth + 1))
        dash = ' stroke-dasharray="5 3"' if result.method == "dense-ann" else ""
        parts.append(f'<polyline points="{points}" fill="none" stroke="{colour}" '
                     f'stroke-width="2"{dash}/>')
        parts.append(f'<text x="{width - 100}" y="{20 + 14 * row}" font-size="11" '
                     f'fill="{colour}">{html.escape(result.method)}</text>')
    parts.append(f'<text x="{(width - 110) / 2 + 20}" y="{height - 2}" font-size="10" '
                 'text-anchor="middle">k</text></svg>')
    return "".join(parts)


def render_html(report: EvalReport) -> str:
    """A small self-contained HTML page: the table, rank histograms, recall@k curves."""
    esc = html.escape
    rows = "".join(
        f"<tr><td>{esc(r.method)}</td><td>{r.pool_size}</td><td>{r.n}</td>"
        + "".join(f"<td>{r.metrics[name]:.3f}</td>" for name in metric_rows(np.zeros(0)))
        + f"<td>{r.ci95['mrr'][0]:.3f}-{r.ci95['mrr'][1]:.3f}</td></tr>"
        for r in report.results)
    sections = []
    for pool in report.pools:
        chosen = [r for r in report.results if r.pool == pool]
        size = chosen[0].pool_size
        title = f"whole index ({size} units)" if pool == WHOLE else f"pool of {size}"
        histograms = "".join(f"<figure>{_svg_histogram(r)}<figcaption>{esc(r.method)}: "
                             "rank of the true unit (&gt;100: later, or not among the "
                             "candidates)</figcaption></figure>" for r in chosen)
        sections.append(f"<h2>{esc(title)}</h2><figure>{_svg_recall_curve(chosen)}"
                        f"<figcaption>recall@k, k = 1..20</figcaption></figure>"
                        f"<div class=row>{histograms}</div>")
    sections.extend(_extra_sections(report))
    notes = "".join(f"<li>{esc(n)}</li>" for n in report.notes)
    verdicts = "".join(f"<li>{esc(report.verdict(p))}</li>" for p in report.pools)
    adapter = (f", with the query adapter tuned on the {report.training} training pairs"
               if report.adapter else "")
    return f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8">
<title>codeseek recall checks: {esc(report.repository)}</title>
<style>
body {{ font-family: system-ui, sans-serif; margin: 2em; color: #222; }}
table {{ border-collapse: collapse; }} td, th {{ padding: 2px 10px; text-align: right; }}
td:first-child, th:first-child {{ text-align: left; }} tr:nth-child(even) {{ background: #f3f3f3; }}
.row {{ display: flex; flex-wrap: wrap; gap: 1em; }} figcaption {{ font-size: 0.85em; }}
</style></head><body>
<h1>Recall checks on held-out docstrings</h1>
<p>{esc(report.repository)}: {report.holdout} held-out docstrings ({esc(report.split.describe())}),
model {esc(report.model)}{esc(adapter)}.</p>
<ul>{verdicts}</ul>
<table><tr><th>method</th><th>pool</th><th>n</th><th>recall@1</th><th>recall@5</th>
<th>recall@10</th><th>MRR</th><th>MRR 95% interval</th></tr>{rows}</table>
{''.join(sections)}
<h2>How these figures were made</h2><ul>{notes}</ul>
</body></html>
"""


def _extra_sections(report: EvalReport) -> list[str]:
    """The name-blind table and the question checks, when measured."""
    esc = html.escape
    sections = []
    if report.name_blind is not None and report.name_blind.results:
        rows = "".join(
            f"<tr><td>{esc(r.method)}</td><td>{r.pool_size}</td><td>{r.n}</td>"
            + "".join(f"<td>{r.metrics[name]:.3f}</td>" for name in metric_rows(np.zeros(0)))
            + f"<td>{r.ci95['mrr'][0]:.3f}-{r.ci95['mrr'][1]:.3f}</td></tr>"
            for r in report.name_blind.results)
        sections.append(
            "<h2>Name-blind: each held-out doc without its unit's identifiers</h2>"
            "<table><tr><th>method</th><th>pool</th><th>n</th><th>recall@1</th>"
            "<th>recall@5</th><th>recall@10</th><th>MRR</th><th>MRR 95% interval</th></tr>"
            f"{rows}</table>")
    asked = report.questions
    if asked is not None:
        cells = "".join(f"<td>{asked.metrics[name]:.3f} ({low:.3f}-{high:.3f})</td>"
                        for name, (low, high) in asked.ci95.items())
        missed = "".join(
            f"<li>line {r.question.line} ({f'rank {r.rank}' if r.rank else 'not ranked'}): "
            f"{esc(r.question.text)}</li>" for r in asked.missed)
        sections.append(
            f"<h2>Questions: {len(asked.results)} from {esc(asked.source)}</h2>"
            "<table><tr><th>hit@1</th><th>hit@5</th><th>hit@10</th><th>MRR@10</th></tr>"
            f"<tr>{cells}</tr></table><p>missed (not in the top 10):</p><ul>{missed}</ul>")
    return sections


def check_report_path(path: Path) -> None:
    """Fail early (before minutes of work) when the report's folder does not exist."""
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise ReportWriteError(f"{path}: cannot write the report: the folder {folder} "
                               "does not exist")


def write_html(report: EvalReport, path: Path) -> None:
    """Write the HTML report to a file."""
    try:
        path.write_text(render_html(report), encoding="utf-8")
    except OSError as exc:
        raise ReportWriteError(f"{path}: cannot write the report: {exc.strerror or exc}") from exc
