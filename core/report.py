"""The agreement report as one offline HTML page (inline SVG charts, no script) plus a CSV.

The page draws its own bar charts as SVG; it loads nothing from the network and
works from a USB stick. The CSV beside it holds every number of the page in long
form (section, group, keypoint, measure, value).
"""
from __future__ import annotations

import html
import io
from pathlib import Path

import numpy as np
import pandas as pd

from .agreement import AgreementReport

CAUTION = ("Research data, not a diagnosis. Agreement figures describe this labelling team and this "
           "population; they are not evidence that a model is fit for clinical use.")


def _e(x) -> str:
    return html.escape(str(x), quote=True)


def bar_chart(labels, values, *, title: str, vmax: float | None = None, fmt: str = "{:.2f}",
              width: int = 560, bar_h: int = 16, colour: str = "#3b6ea8") -> str:
    """A horizontal bar chart as an inline SVG string. NaN values are drawn as 'n/a'."""
    vals = np.asarray(values, float)
    finite = vals[np.isfinite(vals)]
    top = vmax if vmax is not None else (float(finite.max()) if finite.size and finite.max() > 0 else 1.0)
    left, right, head = 130, 60, 26
    plot_w = width - left - right
    h = head + bar_h * len(labels) + 8
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{h}" role="img" '
             f'aria-label="{_e(title)}">',
             f'<text x="4" y="16" font-size="13" font-weight="bold">{_e(title)}</text>']
    for i, (lab, v) in enumerate(zip(labels, vals)):
        y = head + i * bar_h
        parts.append(f'<text x="{left - 6}" y="{y + bar_h - 4}" font-size="11" text-anchor="end">{_e(lab)}</text>')
        if np.isfinite(v):
            w = max(0.0, min(1.0, v / top)) * plot_w if top > 0 else 0.0
            parts.append(f'<rect x="{left}" y="{y + 2}" width="{w:.1f}" height="{bar_h - 4}" fill="{colour}">'
                         f'<title>{_e(lab)}: {_e(fmt.format(v))}</title></rect>')
            parts.append(f'<text x="{left + w + 4:.1f}" y="{y + bar_h - 4}" font-size="10">{_e(fmt.format(v))}</text>')
        else:
            parts.append(f'<text x="{left + 4}" y="{y + bar_h - 4}" font-size="10" fill="#888">n/a</text>')
    parts.append(f'<line x1="{left}" y1="{head}" x2="{left}" y2="{h - 8}" stroke="#444" stroke-width="1"/>')
    parts.append("</svg>")
    return "".join(parts)


def _table(headers, rows) -> str:
    out = ["<table><tr>" + "".join(f"<th>{_e(h)}</th>" for h in headers) + "</tr>"]
    for r in rows:
        out.append("<tr>" + "".join(f"<td>{_e(c)}</td>" for c in r) + "</tr>")
    out.append("</table>")
    return "".join(out)


def _f(v, p=3):
    return "n/a" if v is None or not np.isfinite(v) else f"{v:.{p}f}"


def render_html(rep: AgreementReport, *, title: str = "Kinemark agreement report") -> str:
    names = list(rep.keypoints)
    body = [f"<h1>{_e(title)}</h1>", f'<p class="caution">{_e(CAUTION)}</p>']

    body.append("<h2>Between annotators</h2>")
    share = f" ({rep.share:.0%} of frames, seed {rep.seed})" if rep.share else ""
    body.append(f"<p>Agreement frames: {rep.n_agreement_frames}{_e(share)}. Pairs of labels compared: "
                f"{rep.n_pairs}.")
    if rep.inter_frame_oks:
        body.append(f" Mean OKS per frame: {_f(float(np.mean(rep.inter_frame_oks)))} "
                    f"(first label as ground truth, COCO OKS as in pycocotools).")
    body.append("</p>")
    body.append(bar_chart(names, rep.inter["oks"], title="OKS agreement per keypoint", vmax=1.0))
    body.append(bar_chart(names, rep.inter["pck_0.1_torso"], title="PCK at 0.1 torso size", vmax=1.0))
    body.append(bar_chart(names, rep.inter["mean_dist_torso"], title="Mean distance / torso size",
                          fmt="{:.3f}", colour="#a85a3b"))
    body.append(_table(["keypoint", "OKS", "mean d / torso", "PCK@0.1", "both labelled", "first only",
                        "second only"],
                       [(n, _f(rep.inter["oks"][j]), _f(rep.inter["mean_dist_torso"][j]),
                         _f(rep.inter["pck_0.1_torso"][j], 2), int(rep.inter["n_both_labelled"][j]),
                         int(rep.inter["n_first_only"][j]), int(rep.inter["n_second_only"][j]))
                        for j, n in enumerate(names)]))

    body.append("<h2>Annotator against reviewer</h2>")
    body.append(f"<p>Reviewed annotations: {rep.n_reviewed}; corrected by the reviewer during review: "
                f"{rep.n_corrected}.</p>")
    body.append(bar_chart(names, rep.corrections["share_moved"], title="Share of reviewed annotations "
                          "where the reviewer moved the point", vmax=1.0, colour="#6b8e23"))
    body.append(_table(["keypoint", "moved", "share moved", "visibility changed", "mean move / torso"],
                       [(n, int(rep.corrections["n_moved"][j]), _f(rep.corrections["share_moved"][j], 2),
                         int(rep.corrections["n_visibility_changed"][j]),
                         _f(rep.corrections["mean_move_torso"][j])) for j, n in enumerate(names)]))
    if rep.by_annotator:
        body.append(_table(["annotator", "reviewed", "corrected"], rep.by_annotator))

    body.append("<h2>The model on this population</h2>")
    if not rep.models:
        body.append("<p>No model proposals on accepted frames.</p>")
    for m in rep.models:
        tag = " (adapted)" if m.adapted else " (pretrained)"
        body.append(f"<h3>{_e(m.model_id)}{_e(tag)} <small>{_e(m.model_hash[:12])}</small></h3>")
        body.append(f"<p>Accepted frames with its proposals: {m.n_images}.</p>")
        if m.stats:
            body.append(_table(list(m.stats), [[_f(v) if v >= 0 else "n/a" for v in m.stats.values()]]))
            body.append("<p>Keypoint AP / AR from pycocotools COCOeval (iouType keypoints, the project's "
                        "sigmas); -1 in COCOeval (no objects of that size) is shown as n/a.</p>")
        else:
            body.append(f"<p>{_e(m.message)}</p>")
        body.append(bar_chart(names, m.per_keypoint["pck_0.1_torso"], title="Model PCK at 0.1 torso size",
                              vmax=1.0, colour="#7a4fa0"))
        body.append(bar_chart(names, m.per_keypoint["mean_dist_torso"], title="Model mean error / torso size",
                              fmt="{:.3f}", colour="#a85a3b"))
    if rep.notes:
        body.append("<h2>Notes</h2><ul>" + "".join(f"<li>{_e(n)}</li>" for n in rep.notes) + "</ul>")
    style = ("body{font-family:sans-serif;max-width:900px;margin:2em auto;color:#222}"
             "table{border-collapse:collapse;margin:1em 0}td,th{border:1px solid #bbb;padding:2px 8px;"
             "font-size:12px;text-align:right}th{background:#eee}td:first-child{text-align:left}"
             ".caution{background:#fff4d6;border:1px solid #e0c060;padding:.5em}svg{display:block;margin:1em 0}")
    return (f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>{_e(title)}</title>'
            f"<style>{style}</style></head><body>" + "".join(body) + "</body></html>")


def report_frame(rep: AgreementReport) -> pd.DataFrame:
    return pd.DataFrame(rep.rows(), columns=["section", "group", "keypoint", "measure", "value"])


def report_paths(html_path, csv_path=None, *, project=None,
                 overwrite: bool = True) -> tuple[Path | None, Path | None]:
    """Where :func:`write_report` writes (by default the CSV goes beside the page), checked
    before any work by :class:`.export.Targets`: never onto the project's database or its
    media (with ``project``), never a folder, an existing file only with ``overwrite``."""
    from .export import Targets
    html_path = Path(html_path) if html_path else None
    if csv_path is None and html_path is not None:
        csv_path = html_path.with_suffix(".csv")
    csv_path = Path(csv_path) if csv_path else None
    targets = Targets(project)
    for path in (html_path, csv_path):
        if path is not None:
            targets.file(path, overwrite=overwrite)
    return html_path, csv_path


def write_report(rep: AgreementReport, html_path, csv_path=None, *, project=None,
                 overwrite: bool = True) -> tuple[Path | None, Path | None]:
    """Write the HTML page and/or the CSV (by default the CSV goes beside the page).

    Both or neither: they are written under temporary names and moved into place together
    (:class:`.export.Staged`), after the checks of :func:`report_paths`."""
    from .export import Staged
    html_path, csv_path = report_paths(html_path, csv_path, project=project, overwrite=overwrite)
    with Staged() as staged:
        if html_path is not None:
            staged.file(html_path, render_html(rep).encode("utf-8"))
        if csv_path is not None:
            buf = io.StringIO()
            report_frame(rep).to_csv(buf, index=False)
            staged.file(csv_path, buf.getvalue().encode("utf-8"))
        staged.commit()
    return html_path, csv_path
