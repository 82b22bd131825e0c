"""The collect report as one self-contained HTML file (:func:`build_report`: inline CSS,
images embedded as base64 PNG, nothing fetched) and as markdown (:func:`report_markdown`,
for Prefect artifacts); both render the same blocks and tables.

Top to bottom: the caution (general, then the study's own from ``study.caution``); the
answer, one headline per quantity (estimate and interval at the stated level for the
posterior expectation, the estimator and why, a NOT RELIABLE box listing the error model's
flags); the study; the chain (diagnostics, traces, the cheap model against the observations);
the chosen points (their MMD beside random subsets of the same size, a check of the weights);
the runs; one section per quantity breaking its answer down; weights; config; provenance.
"""

from __future__ import annotations

import base64
import html
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ._report_checks import caution_text, weights_warning
from ._report_plots import pair_plot_png, trace_plot_png
from ._report_sections import (
    _answer_blocks,
    _box,
    _diag_summary,
    _observation_parts,
    _qoi_blocks,
    _trace_rows,
)
from ._report_tables import report_tables
from ._report_text import _fmt, _u

if TYPE_CHECKING:
    from ._collect import ReportData

__all__ = ["build_report", "report_markdown"]


# --------------------------------------------------------------------------------------------
# markdown
# --------------------------------------------------------------------------------------------
def _md_cell(v: Any) -> str:
    return _fmt(v).replace("|", "\\|").replace("\n", " ")


def _md_table(rows: Sequence[dict[str, Any]]) -> str:
    if not rows:
        return "_none_\n"
    cols = list(dict.fromkeys(k for r in rows for k in r))
    out = [
        "| " + " | ".join(c.replace("|", "\\|") for c in cols) + " |",
        "|" + "|".join("---" for _ in cols) + "|",
    ]
    out += ["| " + " | ".join(_md_cell(r.get(c, "")) for c in cols) + " |" for r in rows]
    return "\n".join(out) + "\n"


def _md_blocks(blocks: list[tuple]) -> list[str]:
    out = []
    for b in blocks:
        kind = b[0]
        if kind == "p":
            out.append(f"{b[1]}\n")
        elif kind == "answer":
            out.append(f"**{b[1]}**\n")
        elif kind == "h3":
            out.append(f"#### {b[1]}\n")
        elif kind == "table":
            out.append(_md_table(b[1]))
        elif kind == "note":
            out.append(f"_{b[1]}_\n")
        elif kind == "box":
            out.append(f"> **{b[2]}:** " + " ".join(f"{x}" for x in _bullets(b[3])) + "\n")
    return out


def _bullets(items: list[str]) -> list[str]:
    return [f"({k + 1}) {x}" if len(items) > 1 else x for k, x in enumerate(items)]


def report_markdown(data: ReportData) -> str:
    """The report as markdown (for a Prefect markdown artifact; pictures are in the HTML)."""
    t = report_tables(data)
    general, own = caution_text(data)
    parts = [
        f"# Collect report: {data.study}\n",
        f"> **Caution.** {general}" + (f"\n>\n> **This study:** {own}" if own else "") + "\n",
        "## Answer\n",
    ]
    if data.estimates:
        for est in data.estimates:
            parts += _md_blocks(_answer_blocks(data, est))
    else:
        parts.append("_no estimates_\n")
    parts += [
        "## Study\n",
        _md_table(t["study"]),
        "## Posterior chain\n",
        _diag_summary(data) + "\n",
        _md_table(t["diagnostics"]),
    ]
    if data.chain_diagnostics is not None and data.chain_diagnostics.messages:
        parts.append("\n".join(f"- {m}" for m in data.chain_diagnostics.messages) + "\n")
    parts += ["## Chosen points\n", _md_table(t["selection_check"]), _md_table(t["points"])]
    parts += ["## Runs\n", _md_table(t["outcomes"])]
    if t["reuse"]:
        parts += ["\n", _md_table(t["reuse"])]
    for est in data.estimates:
        parts.append(f"## Quantity: {est.name}{_u(est.units)}\n")
        parts += _md_blocks(_qoi_blocks(data, est, t))
    if t["weights"]:
        parts += ["## Weights used per quantity\n", _md_table(t["weights"])]
    parts += ["## Provenance\n", _md_table(t["provenance"])]
    return "\n".join(parts)


# --------------------------------------------------------------------------------------------
# HTML
# --------------------------------------------------------------------------------------------
_CSS = """
body{font-family:-apple-system,'Segoe UI',Helvetica,Arial,sans-serif;font-size:15px;
 line-height:1.45;color:#1f2328;max-width:1180px;margin:24px auto;padding:0 20px}
h1{font-size:26px;margin:0 0 6px} h2{font-size:20px;margin:28px 0 8px;
 border-bottom:2px solid #d0d7de;padding-bottom:4px} h3{font-size:16px;margin:18px 0 6px}
.sub{color:#57606a;margin:0 0 14px}
.caution{border:2px solid #d4a72c;background:#fff8e1;padding:10px 14px;border-radius:6px;
 margin:12px 0 18px} .caution b{color:#7d4e00} .caution p{margin:4px 0}
.answer{font-size:17px;font-weight:600;margin:14px 0 4px}
.unreliable{border:2px solid #b42318;background:#fef3f2;padding:8px 14px;border-radius:6px;
 margin:6px 0 12px} .unreliable b{color:#b42318}
.warn{border:2px solid #d4a72c;background:#fffbeb;padding:8px 14px;border-radius:6px;
 margin:6px 0 12px} .warn b{color:#7d4e00}
.unreliable ul,.warn ul{margin:4px 0 0;padding-left:20px}
.fail{color:#b42318;font-weight:600} .ok{color:#1a7f37;font-weight:600}
table{border-collapse:collapse;margin:6px 0 12px;font-size:13.5px}
th,td{border:1px solid #d0d7de;padding:4px 8px;vertical-align:top}
th{background:#f0f3f6;text-align:left;font-weight:600}
td.n{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
tr:nth-child(even) td{background:#fafbfc}
.wrap{overflow-x:auto} .note{color:#57606a;font-size:13px}
img{max-width:100%;height:auto;border:1px solid #e5e7eb;margin:6px 0}
pre{background:#f6f8fa;padding:10px;overflow-x:auto;font-size:12.5px}
details summary{cursor:pointer;color:#0b5cad}
"""


def _h(x: Any) -> str:
    return html.escape(str(x), quote=True)


def _html_table(rows: Sequence[dict[str, Any]], empty: str = "none") -> str:
    if not rows:
        return f'<p class="note">{_h(empty)}</p>'
    cols = list(dict.fromkeys(k for r in rows for k in r))
    head = "".join(f"<th>{_h(c)}</th>" for c in cols)
    body = []
    for r in rows:
        cells = []
        for c in cols:
            v = r.get(c, "")
            numeric = isinstance(v, int | float | np.integer | np.floating) and not isinstance(
                v, bool
            )
            cls = ' class="n"' if numeric or v is None else ""
            cells.append(f"<td{cls}>{_h(_fmt(v))}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return (
        f'<div class="wrap"><table><thead><tr>{head}</tr></thead>'
        f"<tbody>{''.join(body)}</tbody></table></div>"
    )


def _img(png: bytes | None, alt: str) -> str:
    if png is None:
        return ""
    b64 = base64.b64encode(png).decode("ascii")
    return f'<img alt="{_h(alt)}" src="data:image/png;base64,{b64}">'


def _html_blocks(blocks: list[tuple]) -> list[str]:
    out = []
    for b in blocks:
        kind = b[0]
        if kind == "p":
            out.append(f"<p>{_h(b[1])}</p>")
        elif kind == "answer":
            out.append(f'<p class="answer">{_h(b[1])}</p>')
        elif kind == "h3":
            out.append(f"<h3>{_h(b[1])}</h3>")
        elif kind == "table":
            out.append(_html_table(b[1]))
        elif kind == "note":
            out.append(f'<p class="note">{_h(b[1])}</p>')
        elif kind == "box":
            _, cls, title, items = b
            out.append(
                f'<div class="{_h(cls)}"><b>{_h(title)}:</b><ul>'
                + "".join(f"<li>{_h(x)}</li>" for x in items)
                + "</ul></div>"
            )
        elif kind == "image":
            _, png, alt, cap = b
            if png is not None:
                out.append(_img(png, alt))
                if cap:
                    out.append(f'<p class="note">{_h(cap)}</p>')
    return out


def _html_top(data: ReportData, t: dict[str, list]) -> list[str]:
    """Title, caution, the list of sections and the answer."""
    nav = [("answer", "answer"), ("study", "study"), ("chain", "chain"), ("points", "points")]
    nav += [("runs", "runs")] + [(f"qoi-{e.name}", e.name) for e in data.estimates]
    if t["weights"]:
        nav.append(("weights", "weights"))
    if data.config_text:
        nav.append(("config", "config"))
    nav.append(("provenance", "provenance"))
    sub = " · ".join(
        x
        for x in (
            f"revision {data.revision}" if data.revision else "",
            f"config {data.config_hash[:12]}" if data.config_hash else "",
            data.created,
        )
        if x
    )
    general, own = caution_text(data)
    body = [
        f"<h1>Collect report: {_h(data.study)}</h1>",
        f'<p class="sub">{_h(sub)}</p>' if sub else "",
        f'<div class="caution"><p><b>Caution.</b> {_h(general)}</p>'
        + (f"<p><b>This study:</b> {_h(own)}</p>" if own else "")
        + "</div>",
        '<p class="note">Sections: '
        + " · ".join(f'<a href="#{_h(a)}">{_h(n)}</a>' for a, n in nav)
        + "</p>",
        '<h2 id="answer">Answer</h2>',
    ]
    if data.estimates:
        for est in data.estimates:
            body += _html_blocks(_answer_blocks(data, est))
    else:
        body.append('<p class="note">No estimates.</p>')
    return body


def _html_chain(data: ReportData, t: dict[str, list]) -> list[str]:
    """The chain: its diagnostics, traces and the cheap model against the observations."""
    diag = data.chain_diagnostics
    cls = "ok" if diag is not None and diag.passed else "fail" if diag is not None else "note"
    body = [
        '<h2 id="chain">Posterior chain</h2>',
        f'<p class="{cls}">{_h(_diag_summary(data))}</p>',
    ]
    if diag is not None and diag.messages:
        body.append(
            "<ul>" + "".join(f'<li class="fail">{_h(m)}</li>' for m in diag.messages) + "</ul>"
        )
    body.append(_html_table(t["diagnostics"], "No per-parameter diagnostics recorded."))
    if data.chain_samples is not None and len(data.chain_samples):
        chain, draw, note = _trace_rows(data)
        png = trace_plot_png(
            data.chain_samples, data.chain_names, data.chain_units, chain=chain, draw=draw
        )
        if png is not None:
            body += [
                "<h3>Traces</h3>",
                _img(png, "trace of every parameter"),
                f'<p class="note">{_h("Each parameter against the draw number, one colour per chain." + note)}</p>',
            ]
    obs = _observation_parts(data)
    body.append("<h3>The cheap model against the observations</h3>")
    if obs is None:
        body.append(
            '<p class="note">Not shown: this report\'s data hold no observations with the '
            "cheap model's predictions at them.</p>"
        )
    else:
        png, text = obs
        body += [
            _img(png, "cheap model against the observations"),
            f'<p class="note">{_h(text)}</p>',
        ]
    return body


def _html_points(data: ReportData, t: dict[str, list]) -> list[str]:
    """The chosen points: the selection, its check, the weights and the pair plot."""
    body = ['<h2 id="points">Chosen points</h2>']
    sel = data.selection
    if sel is not None:
        body.append(
            f"<p>{sel.m} points chosen by the {_h(sel.method)} selector with "
            f"{_h(sel.weights_rule)} weights; kernel {_h(sel.kernel)} with bandwidth "
            f"{_fmt(sel.bandwidth)} in standardised coordinates.</p>"
        )
        body.append(_html_table(t["selection_check"]))
        ww = weights_warning(sel.weights)
        if ww:
            body += _html_blocks([_box("warn", "Weights", [ww])])
        png = pair_plot_png(
            data.chain_samples, data.chain_names, data.chain_units, sel.points, sel.weights
        )
        if png is not None:
            body.append(_img(png, "chosen points over the posterior chain"))
            cap = (
                "Grey: posterior chain rows; red: chosen points, marker area proportional "
                "to weight (on the diagonal, line height grows with weight)."
            )
            if sel.points.shape[1] > 6:
                cap += f" Only the first 6 of {sel.points.shape[1]} parameters are drawn."
            body.append(f'<p class="note">{_h(cap)}</p>')
        else:
            body.append('<p class="note">Pictures left out: matplotlib is not installed.</p>')
    body.append(_html_table(t["points"], "No selection recorded."))
    return body


def _html(data: ReportData) -> str:
    t = report_tables(data)
    body = _html_top(data, t)
    body += ['<h2 id="study">Study</h2>', _html_table(t["study"])]
    body += _html_chain(data, t)
    body += _html_points(data, t)
    body.append('<h2 id="runs">Runs</h2>')
    if data.outcomes:
        counts: dict[str, int] = {}
        for o in data.outcomes:
            counts[o.state] = counts.get(o.state, 0) + 1
        body.append("<p>" + _h(", ".join(f"{v} {k}" for k, v in counts.items())) + ".</p>")
    if t["reuse"]:
        body.append(_html_table(t["reuse"]))
    body.append(_html_table(t["outcomes"], "No run outcomes recorded."))
    for est in data.estimates:
        body.append(f'<h2 id="qoi-{_h(est.name)}">Quantity: {_h(est.name + _u(est.units))}</h2>')
        body += _html_blocks(_qoi_blocks(data, est, t))
    if t["weights"]:
        body += ['<h2 id="weights">Weights used per quantity</h2>', _html_table(t["weights"])]
    if data.config_text:
        body += [
            '<h2 id="config">Study config</h2>',
            f"<details><summary>Show the config file</summary><pre>{_h(data.config_text)}"
            "</pre></details>",
        ]
    body += ['<h2 id="provenance">Provenance</h2>', _html_table(t["provenance"], "None recorded.")]
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f"<title>Collect report: {_h(data.study)}</title><style>{_CSS}</style></head>"
        "<body>\n" + "\n".join(b for b in body if b) + "\n</body></html>\n"
    )


def build_report(data: ReportData, out_dir: Path | str) -> Path:
    """Write the self-contained HTML report into ``out_dir`` and return its path.

    The file (``report.html``) has inline CSS and base64 PNG images and refers to no
    external URL; without matplotlib it is written without pictures.
    """
    out = Path(out_dir)
    text = _html(data)  # build everything before touching the disk
    out.mkdir(parents=True, exist_ok=True)
    path = out / "report.html"
    path.write_text(text, encoding="utf-8")
    return path
