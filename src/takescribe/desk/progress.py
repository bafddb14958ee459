"""Progress across takes: one student, one piece, the stored findings of each take in date order.

Computed from ``findings.json`` files only (nothing is transcribed again):

- findings per bar over the takes, drawn as a picture (bars down the side, takes across);
- the bars that keep coming back (findings in at least half of the takes, and in two or more);
- tempo spread per take (how far the bar-by-bar pace strays from the take's own median pace);
- counts per kind over the takes.

Used by the desk's page and by ``takescribe progress`` on a folder of report folders.
"""

from __future__ import annotations

import html
import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..report.practice import KIND_STYLES
from ..safeio import check_writable, write_text
from .intake import parse_date

__all__ = ["ProgressSettings", "TakeFindings", "Progress", "load_findings", "summarize_progress", "progress_json",
           "progress_html", "progress_page", "write_progress", "takes_from_folder"]

FINDINGS_SCHEMA = "takescribe-findings/1"


@dataclass(frozen=True)
class ProgressSettings:
    """What counts as a bar that keeps coming back.

    Attributes
    ----------
    recurring_share : float
        Share of the takes a bar must have findings in.
    recurring_min_takes : int
        And at least this many takes (one take alone shows no pattern).
    """

    recurring_share: float = 0.5    # "more often than not": common practice, no source
    recurring_min_takes: int = 2


@dataclass(frozen=True)
class TakeFindings:
    """The stored findings of one take."""

    label: str
    date: str
    findings: tuple
    counts: dict
    tempo_bpm: tuple
    n_bars: int
    notes_in_part: int
    href: str | None = None


@dataclass(frozen=True)
class Progress:
    """Progress across takes (see the module docstring); arrays are ``(n_bars, n_takes)``."""

    takes: tuple
    bars: tuple
    per_bar: np.ndarray
    recurring: tuple
    tempo_spread: tuple
    median_bpm: tuple
    counts: dict


def load_findings(path, *, label: str | None = None, date: str | None = None, href: str | None = None) -> TakeFindings:
    """Read a ``findings.json`` written by the practice report.

    Raises
    ------
    InputError
        For a missing, unreadable or foreign file.
    """
    path = Path(path)
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(f"{path}: cannot read the findings ({exc})") from exc
    if not isinstance(data, dict) or data.get("schema") != FINDINGS_SCHEMA:
        raise InputError(f"{path}: not a takescribe findings file (expected schema {FINDINGS_SCHEMA})")
    summary = data.get("summary", {})
    tempo = tuple(float(p["beats_per_minute"]) for p in summary.get("tempo_curve", [])
                  if p.get("beats_per_minute"))
    measures = [int(p["measure"]) for p in summary.get("tempo_curve", []) if p.get("measure") is not None]
    measures += [int(f["measure"]) for f in data.get("findings", []) if f.get("measure") is not None]
    return TakeFindings(label=label or path.parent.name, date=date or "", findings=tuple(data.get("findings", [])),
                        counts=dict(summary.get("counts", {})), tempo_bpm=tempo, n_bars=max(measures, default=0),
                        notes_in_part=int(summary.get("notes_in_part", 0)), href=href)


def _spread(bpm) -> tuple[float, float]:
    """Median pace and spread: median absolute deviation x 1.4826 (a robust standard deviation) in % of it."""
    if len(bpm) < 2:
        return (float(bpm[0]) if len(bpm) else float("nan")), float("nan")
    values = np.asarray(bpm, dtype=float)
    median = float(np.median(values))
    return median, float(100.0 * 1.4826 * np.median(np.abs(values - median)) / median)


def summarize_progress(takes, *, settings: ProgressSettings | None = None) -> Progress:
    """Progress across ``takes`` (a sequence of :class:`TakeFindings`, in the order to show)."""
    settings = settings or ProgressSettings()
    takes = tuple(takes)
    n_bars = max((t.n_bars for t in takes), default=0)
    per_bar = np.zeros((n_bars, len(takes)), dtype=int)
    for k, take in enumerate(takes):
        for finding in take.findings:
            if finding.get("measure") is not None and 1 <= int(finding["measure"]) <= n_bars \
                    and finding.get("linked_to") is None:
                per_bar[int(finding["measure"]) - 1, k] += 1
    present = (per_bar > 0).sum(axis=1)
    need = max(settings.recurring_min_takes, int(np.ceil(settings.recurring_share * len(takes))))
    recurring = tuple(
        {"bar": b + 1, "takes": int(present[b]), "findings": int(per_bar[b].sum()),
         "in_latest": bool(len(takes) and per_bar[b, -1] > 0)}
        for b in np.argsort(-present, kind="stable") if present[b] >= need)
    paces = [_spread(t.tempo_bpm) for t in takes]
    kinds = [k for k in KIND_STYLES if any(t.counts.get(k) for t in takes)]
    counts = {k: tuple(int(t.counts.get(k, 0)) for t in takes) for k in kinds}
    return Progress(takes=takes, bars=tuple(range(1, n_bars + 1)), per_bar=per_bar, recurring=recurring,
                    tempo_spread=tuple(s for _, s in paces), median_bpm=tuple(m for m, _ in paces), counts=counts)


def _num(x: float):
    return None if x != x else round(float(x), 2)


def progress_json(progress: Progress) -> dict:
    """A JSON-ready dict of :class:`Progress` (schema ``takescribe-progress/1``)."""
    return {
        "schema": "takescribe-progress/1",
        "takes": [{"label": t.label, "date": t.date, "findings": int(progress.per_bar[:, k].sum()),
                   "median_bpm": _num(progress.median_bpm[k]), "tempo_spread_percent": _num(progress.tempo_spread[k]),
                   "counts": {kind: int(progress.counts[kind][k]) for kind in progress.counts}}
                  for k, t in enumerate(progress.takes)],
        "findings_per_bar": {str(b): [int(v) for v in progress.per_bar[b - 1]] for b in progress.bars},
        # numpy numbers (counts, bars) become plain JSON numbers
        "recurring_bars": [{key: (v.item() if hasattr(v, "item") else v) for key, v in r.items()}
                           for r in progress.recurring],
        "note": "Drafts for a teacher's judgement, not grades.",
    }


def _grid_svg(progress: Progress) -> str:
    """Bars down the side, takes across; a mark sized by the number of findings in that bar."""
    n_bars, n_takes = progress.per_bar.shape
    cell, left, top = 30, 78, 92
    width, height = left + cell * max(n_takes, 1) + 70, top + cell * n_bars + 10
    recurring = {r["bar"] for r in progress.recurring}
    out = [f'<svg class="grid" viewBox="0 0 {width} {height}" width="{width}" height="{height}" role="img"'
           ' aria-label="findings per bar, one column per take">']
    for k, take in enumerate(progress.takes):
        x = left + k * cell + cell / 2
        out.append(f'<text x="{x}" y="{top - 8}" font-size="11" transform="rotate(-55 {x} {top - 8})">'
                   f'{html.escape(take.date or take.label)}</text>')
    for b in range(n_bars):
        y = top + b * cell
        weight = ' font-weight="bold"' if b + 1 in recurring else ""
        mark = " \u25c0" if b + 1 in recurring else ""
        out.append(f'<text x="4" y="{y + cell * 0.65}" font-size="12"{weight}>bar {b + 1}{mark}</text>')
        for k in range(n_takes):
            x = left + k * cell
            out.append(f'<rect x="{x}" y="{y}" width="{cell}" height="{cell}" fill="#fafafa" stroke="#ddd"/>')
            count = int(progress.per_bar[b, k])
            if count:
                kinds = ", ".join(sorted({KIND_STYLES.get(f["kind"], KIND_STYLES["extra"]).label
                                          for f in progress.takes[k].findings if f.get("measure") == b + 1}))
                r = min(cell / 2 - 2, 4 + 3 * count)
                out.append(f'<circle cx="{x + cell / 2}" cy="{y + cell / 2}" r="{r}" fill="#333">'
                           f'<title>bar {b + 1}, {html.escape(progress.takes[k].label)}: {count} ({kinds})</title>'
                           '</circle>')
    out.append("</svg>")
    return "".join(out)


def _spark(values, *, height: int = 28, width: int = 140) -> str:
    top = max(max(values, default=0), 1)
    step = width / max(len(values) - 1, 1)
    points = " ".join(f"{i * step:.1f},{height - 2 - (height - 4) * v / top:.1f}" for i, v in enumerate(values))
    return (f'<svg width="{width}" height="{height}" aria-hidden="true"><polyline points="{points}" fill="none"'
            ' stroke="#0072B2" stroke-width="2"/></svg>')


def progress_html(progress: Progress) -> str:
    """The progress content as an HTML fragment (no page around it)."""
    takes = progress.takes
    if not takes:
        return "<p>No analysed takes yet.</p>"
    heads = "".join("<th>" + (f'<a href="{html.escape(t.href)}">{html.escape(t.date or t.label)}</a>' if t.href
                              else html.escape(t.date or t.label)) + "</th>" for t in takes)
    if progress.recurring:
        items = "".join(f"<li>bar {r['bar']}: findings in {r['takes']} of {len(takes)} takes"
                        f"{', still in the latest' if r['in_latest'] else ', not in the latest'}</li>"
                        for r in progress.recurring)
        recurring = f"<ul class=\"recurring\">{items}</ul>"
    else:
        recurring = "<p>No bar has findings in most of the takes.</p>"
    tempo = "".join(f"<td class=\"num\">{'' if s != s else f'{s:.1f} %'}"
                    f"<br><small>{'' if m != m else f'{m:.0f} per minute'}</small></td>"
                    for s, m in zip(progress.tempo_spread, progress.median_bpm))
    rows = "".join(f"<tr><td>{html.escape(KIND_STYLES[k].label)}</td>"
                   + "".join(f"<td class=\"num\">{v}</td>" for v in vals) + f"<td>{_spark(vals)}</td></tr>"
                   for k, vals in progress.counts.items())
    totals = "".join(f"<td class=\"num\"><b>{int(progress.per_bar[:, k].sum())}</b></td>" for k in range(len(takes)))
    return (
        "<h2>Where the findings were, take by take</h2>"
        "<p>Each column is a take, oldest on the left; each row is a bar. A dot marks findings in that bar"
        " (larger: more). Bars marked \u25c0 keep coming back.</p>"
        f'<div class="gridbox">{_grid_svg(progress)}</div>'
        f"<h2>Bars that keep coming back</h2>{recurring}"
        "<h2>Findings and steadiness per take</h2>"
        f"<table class=\"over\"><thead><tr><th></th>{heads}<th>trend</th></tr></thead><tbody>"
        f"<tr><td>tempo spread (lower is steadier)</td>{tempo}<td></td></tr>{rows}"
        f"<tr><td><b>all findings</b></td>{totals}<td>{_spark([int(progress.per_bar[:, k].sum()) for k in range(len(takes))])}</td></tr>"
        "</tbody></table>"
        "<p><small>Tempo spread: how far the pace of single bars strays from the take's own median pace"
        " (a robust standard deviation, in percent); a hesitation or a planned slowing counts too."
        " These are drafts for a teacher's judgement, not grades.</small></p>")


_PAGE = """<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{title}</title>
<style>body{{font-family:system-ui,sans-serif;margin:1.5rem auto;max-width:70rem;padding:0 1rem;color:#1a1a1a}}
table{{border-collapse:collapse}} th,td{{border-bottom:1px solid #ddd;padding:.25rem .5rem;text-align:left}}
td.num{{text-align:right}} .gridbox{{overflow-x:auto}}</style></head>
<body><h1>{title}</h1>{body}</body></html>
"""


def progress_page(progress: Progress, *, title: str) -> str:
    """A standalone HTML page of the progress (what ``takescribe progress`` writes)."""
    return _PAGE.format(title=html.escape(title), body=progress_html(progress))


def takes_from_folder(folder) -> list[TakeFindings]:
    """The report folders inside ``folder`` (each with a ``findings.json``), by the date in their name, then name.

    Raises
    ------
    InputError
        When ``folder`` holds no report folder, or reports of different parts.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"{folder}: not a folder; give the folder holding one report folder per take")
    found = sorted((p.parent for p in folder.glob("*/findings.json")),
                   key=lambda p: (parse_date(p.name) or "", p.name))
    if not found:
        raise InputError(f"{folder}: holds no report folder (a subfolder with findings.json, as"
                         " 'takescribe compare -o' writes)")
    takes = [load_findings(p / "findings.json", label=p.name, date=parse_date(p.name) or "") for p in found]
    sizes = {t.notes_in_part for t in takes}
    if len(sizes) > 1:
        raise InputError(f"{folder}: the reports are of different parts ({', '.join(map(str, sorted(sizes)))} notes);"
                         " keep one piece's reports per folder")
    return takes


def write_progress(folder, html_path, *, json_path=None, force: bool = False) -> Progress:
    """The ``progress`` job: a folder of report folders to an HTML page (and JSON)."""
    for path in (html_path, json_path):
        if path is not None:
            check_writable(path, force=force)
    progress = summarize_progress(takes_from_folder(folder))
    write_text(html_path, progress_page(progress, title=f"Over the takes: {Path(folder).name}"), force=force)
    if json_path is not None:
        write_text(json_path, json.dumps(progress_json(progress), indent=1) + "\n", force=force)
    return progress
