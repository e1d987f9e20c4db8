"""``phantom_report.html``: one self-contained page (inline style, no scripts, no web fonts).

Figures are PNG files beside the page, referenced by relative file name, so
the folder can be copied or archived as a whole and opened offline.
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field

from .results import fmt

__all__ = ["CAUTIONS", "ReportContent", "ReportFigure", "render_html"]

CAUTIONS = [
    ("This check compares the values measured in a phantom with the reference table that was supplied. A pass "
    "means that this protocol reproduced those values in this session, at the stated phantom temperature. It does "
    "not certify the scanner, the protocol or any patient measurement for clinical use."),
    ("Acceptance testing, clinical release and the action to take after a failed or drifting check follow your "
    "local regulations and are decided by the site's medical physicist."),
    ("The verdict is only as good as its inputs: the certified values and their temperature dependence, the "
    "phantom temperature actually reached in the bore (not the room temperature), the field strength the "
    "certificate applies to, and ROIs that sit inside the vials (check the ROI figures)."),
]

_CSS = """
body{font-family:"DejaVu Sans",Verdana,sans-serif;color:#23272e;max-width:1120px;margin:24px auto;padding:0 20px;
line-height:1.45;font-size:15px}
h1{font-size:24px;margin:0 0 4px}h2{font-size:18px;margin:28px 0 8px;border-bottom:1px solid #d5dae2;padding-bottom:3px}
.meta{color:#5b6472;margin:0 0 14px}
.verdict{border-radius:6px;padding:14px 18px;margin:12px 0 8px;border:2px solid}
.verdict.pass{background:#e8f4f1;border-color:#1d7a6a}.verdict.fail{background:#f8ebe6;border-color:#b4462b}
.verdict .big{font-size:22px;font-weight:bold;letter-spacing:.5px}
.verdict.pass .big{color:#1d7a6a}.verdict.fail .big{color:#b4462b}
.verdict ul{margin:6px 0 0 0}
.drift{background:#fbf3df;border:1px solid #c98a0b;border-radius:6px;padding:8px 14px;margin:8px 0}
table{border-collapse:collapse;font-size:13.5px;margin:6px 0}
th,td{padding:4px 9px;border-bottom:1px solid #e3e7ed;text-align:right;white-space:nowrap}
th{background:#f1f3f6;position:sticky;top:0}td.l,th.l{text-align:left}
tr.fail td{background:#fbeee9}td.ok{color:#1d7a6a;font-weight:bold}td.bad{color:#b4462b;font-weight:bold}
dl.settings{display:grid;grid-template-columns:max-content 1fr;gap:3px 16px;margin:6px 0}
dl.settings dt{color:#5b6472}dl.settings dd{margin:0}
figure{margin:18px 0}figure img{max-width:100%;border:1px solid #e3e7ed}
figcaption{color:#4a5260;font-size:13.5px;margin-top:4px;max-width:900px}
.warn li{margin:2px 0}.caution{background:#f4f5f8;border-left:4px solid #6b7485;padding:6px 16px;margin-top:28px}
footer{color:#7a8290;font-size:12px;margin-top:24px;word-break:break-all}
code{font-size:13px}
"""


@dataclass
class ReportFigure:
    file: str
    title: str
    caption: str
    alt: str = ""


@dataclass
class ReportContent:
    title: str
    meta: str
    passed: bool
    headline: str
    failures: list
    drift_lines: list
    settings: list  # (term, text)
    rows: list
    warnings: list
    figures: list
    history_figures: list = field(default_factory=list)
    history_text: str = ""
    footer: str = ""


def _e(x) -> str:
    return html.escape(str(x), quote=True)


def _table(rows) -> str:
    with_se = any(r.mean_se == r.mean_se for r in rows)  # a standard-error map was found for some map
    se_head = "<th title='mean standard error from the fit (about the SD when the spread is noise)'>mean SE</th>"
    head = ("<tr><th>vial</th><th class='l'>name</th><th class='l'>parameter</th><th class='l'>unit</th>"
            "<th>reference</th><th>median</th>"
            f"<th>mean</th><th>SD</th>{se_head if with_se else ''}<th>robust SD</th><th>voxels</th>"
            "<th>error of median</th><th>tolerance</th><th class='l'>result</th></tr>")
    out = [f"<table>{head}"]
    for r in rows:
        u = _e(r.unit)
        if r.pass_:
            res = "<td class='l ok'>within</td>"
        elif r.too_small:
            res = f"<td class='l bad'>ROI too small ({r.n_voxels} voxels)</td>"
        else:
            res = "<td class='l bad'>OUT</td>"
        err = "" if r.error_pct != r.error_pct else ("0.0%" if abs(r.error_pct) < 0.05 else f"{r.error_pct:+.1f}%")
        out.append(
            f"<tr class='{'pass' if r.pass_ else 'fail'}'><td>{r.label}</td><td class='l'>{_e(r.name)}</td>"
            f"<td class='l'>{_e(r.key)}</td><td class='l'>{u}</td><td>{fmt(r.reference, 5)}</td>"
            f"<td>{fmt(r.median, 5)}</td>"
            f"<td>{fmt(r.mean, 5)}</td><td>{fmt(r.sd, 3)}</td>{f'<td>{fmt(r.mean_se, 3)}</td>' if with_se else ''}"
            f"<td>{fmt(r.robust_sd, 3)}</td><td>{r.n_voxels}</td>"
            f"<td>{err}</td><td>\u00b1{r.tolerance_pct:g}%</td>{res}</tr>")
    out.append("</table>")
    return "\n".join(out)


def _figures(figs) -> str:
    return "\n".join(
        f"<figure><img src='{_e(f.file)}' alt='{_e(f.alt or f.title)}'><figcaption><b>{_e(f.title)}.</b> "
        f"{_e(f.caption)}</figcaption></figure>" for f in figs)


def render_html(c: ReportContent) -> bytes:
    """The report page as UTF-8 bytes."""
    cls = "pass" if c.passed else "fail"
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<title>{_e(c.title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{_e(c.title)}</h1><p class='meta'>{_e(c.meta)}</p>",
        f"<section class='verdict {cls}'><div class='big'>{'PASSED' if c.passed else 'NOT PASSED'}</div>",
        f"<p>{_e(c.headline)}</p>",
    ]
    if c.failures:
        parts.append("<ul>" + "".join(f"<li>{_e(f)}</li>" for f in c.failures) + "</ul>")
    parts.append("</section>")
    if c.drift_lines:
        parts.append("<div class='drift'><b>Drift:</b><ul>" + "".join(f"<li>{_e(d)}</li>" for d in c.drift_lines)
                     + "</ul></div>")
    if c.warnings:
        parts.append("<h2>Warnings</h2><ul class='warn'>" + "".join(f"<li>{_e(w)}</li>" for w in c.warnings)
                     + "</ul>")
    parts.append("<h2>Results</h2>")
    parts.append(_table(c.rows))
    parts.append("<h2>How it was measured</h2><dl class='settings'>"
                 + "".join(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>" for k, v in c.settings) + "</dl>")
    parts.append("<h2>Figures</h2>" + _figures(c.figures))
    if c.history_figures or c.history_text:
        parts.append("<h2>History</h2>")
        if c.history_text:
            parts.append(f"<p>{_e(c.history_text)}</p>")
        parts.append(_figures(c.history_figures))
    parts.append("<section class='caution'><h2>Scope of this check</h2>"
                 + "".join(f"<p>{_e(t)}</p>" for t in CAUTIONS) + "</section>")
    parts.append(f"<footer>{_e(c.footer)}</footer></body></html>\n")
    return "\n".join(parts).encode("utf-8")
