"""The HTML batch report: one self-contained page (figures embedded as PNG data, a little
inline script to sort and filter the table, no external assets) that a person can open in
any browser and pass on.
"""

from __future__ import annotations

import base64
import html
import math
import os
from collections.abc import Iterator, Mapping
from pathlib import Path

import numpy as np

from ._io import atomic_write

__all__ = ["FIGURE_FILES", "report_html", "report_parts", "threshold_rows", "write_report"]

# figure name -> (file in OUTDIR, caption)
FIGURE_FILES = {
    "drift": ("drift.png", "Shift against the reference, with 1-sigma error bars"),
    "fwhm": ("fwhm.png", "Median line FWHM, coloured by the FWHM check alone, with its limits"),
    "status": ("status.png", "Exposures by status"),
}

# columns shown in the table, with their headings
_TABLE_COLUMNS = (
    ("index", "#"),
    ("file", "file"),
    ("status", "status"),
    ("reasons", "reasons"),
    ("timestamp", "time stamp"),
    ("shift_px", "shift (px)"),
    ("shift_nm", "shift (nm)"),
    ("stretch", "stretch"),
    ("fwhm_px", "FWHM (px)"),
    ("fwhm_change_pct", "ΔFWHM (%)"),
    ("resolving_power", "λ/Δλ"),
    ("n_lines", "lines found"),
    ("saturated_pixels", "saturated px"),
    ("masked_samples", "masked samples"),
    ("snr_median", "median SNR"),
)

_FORMATS = {
    "shift_px": "{:+.3f}",
    "shift_err_px": "{:.3f}",
    "shift_nm": "{:+.5f}",
    "stretch": "{:+.2e}",
    "fwhm_px": "{:.3f}",
    "fwhm_change_pct": "{:+.1f}",
    "resolving_power": "{:.0f}",
    "snr_median": "{:.1f}",
}

# the worst first: that is what a person opening the report looks for
_SEVERITY = {"error": 0, "fail": 1, "warn": 2, "pass": 3}

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:1em;color:#222}
h1{font-size:1.4em;margin-bottom:.2em} h2{font-size:1.1em;margin-top:1.4em}
.totals span{display:inline-block;margin-right:1.2em;padding:.2em .6em;border-radius:4px;
 color:#fff;font-weight:600;cursor:pointer}
.pass{background:#2e7d32}.warn{background:#f9a825;color:#222!important}.fail{background:#c62828}
.error{background:#6a1b9a}.all{background:#455a64}
.banner{border:3px solid #c62828;background:#ffebee;padding:.6em 1em;font-size:1.05em}
table.meta td{padding:.1em .8em .1em 0;vertical-align:top}
table.meta td:first-child{color:#555}
figure{display:inline-block;margin:.5em 1em .5em 0;max-width:100%}
figure img{max-width:100%;height:auto}
figcaption{font-size:.85em;color:#555}
.scroll{overflow-x:auto;max-width:100%}
#rows{border-collapse:collapse;font-size:.78em;width:100%}
#rows th,#rows td{border-bottom:1px solid #ddd;padding:.2em .35em;text-align:right;
 white-space:nowrap}
#rows th{white-space:normal;vertical-align:bottom}
#rows td.t,#rows th.t{text-align:left}
#rows td.f{max-width:11em;overflow:hidden;text-overflow:ellipsis}
#rows td.r{white-space:normal;text-align:left;min-width:14em;max-width:26em}
#rows th{cursor:pointer;position:sticky;top:0;background:#eceff1;user-select:none}
#rows th[aria-sort=ascending]::after{content:" ▲"}
#rows th[aria-sort=descending]::after{content:" ▼"}
#rows tr.s-warn td{background:#fff8e1} #rows tr.s-fail td{background:#ffebee}
#rows tr.s-error td{background:#f3e5f5}
#rows .err{color:#666;font-size:.9em}
#filter{margin:.5em 0;padding:.3em;width:24em;max-width:100%}
"""

# Sorting: numbers by value (blank last), text by locale order; filter by any text.
_JS = """
(function(){
  var table=document.getElementById('rows'), body=table.tBodies[0];
  var heads=table.tHead.rows[0].cells;
  function key(cell,num){var v=cell.getAttribute('data-v');
    if(v===null){v=cell.textContent;}
    if(num){var x=parseFloat(v);return isNaN(x)?Infinity:x;} return v.toLowerCase();}
  Array.prototype.forEach.call(heads,function(th,col){
    th.addEventListener('click',function(){
      var num=th.getAttribute('data-num')==='1';
      var dir=th.getAttribute('aria-sort')==='ascending'?-1:1;
      Array.prototype.forEach.call(heads,function(h){h.removeAttribute('aria-sort');});
      th.setAttribute('aria-sort',dir===1?'ascending':'descending');
      var rows=Array.prototype.slice.call(body.rows);
      rows.sort(function(a,b){var x=key(a.cells[col],num),y=key(b.cells[col],num);
        if(x<y)return -dir; if(x>y)return dir; return 0;});
      var frag=document.createDocumentFragment();
      rows.forEach(function(r){frag.appendChild(r);}); body.appendChild(frag);
    });
  });
  var filter=document.getElementById('filter');
  function show(q,status){
    Array.prototype.forEach.call(body.rows,function(r){
      var ok=status?r.className==='s-'+status:(!q||r.textContent.toLowerCase().indexOf(q)>=0);
      r.style.display=ok?'':'none';});
  }
  filter.addEventListener('input',function(){show(filter.value.toLowerCase(),null);});
  // a click on a total shows only the exposures with that status ("total": all of them)
  Array.prototype.forEach.call(document.querySelectorAll('.totals [data-status]'),function(b){
    b.addEventListener('click',function(){filter.value='';
      show('',b.getAttribute('data-status')==='all'?null:b.getAttribute('data-status'));});
  });
  document.body.setAttribute('data-ritzline-ready', String(body.rows.length));
})();
"""


def _cell(name: str, value) -> str:
    if value is None or (hasattr(value, "mask") and bool(getattr(value, "mask", False))):
        return '<td data-v=""></td>'
    if name in _FORMATS:
        v = float(value)
        if not math.isfinite(v):
            return '<td data-v=""></td>'
        return f'<td data-v="{v!r}">{html.escape(_FORMATS[name].format(v))}</td>'
    if isinstance(value, (int, float)) or (hasattr(value, "dtype") and value.dtype.kind in "iuf"):
        return f'<td data-v="{value}">{value}</td>'
    text = html.escape(str(value))
    if name == "file":  # the name reads at a glance; the full path is in the tooltip
        base = html.escape(str(value).replace("\\", "/").rsplit("/", 1)[-1])
        return f'<td class="t f" data-v="{text}" title="{text}">{base}</td>'
    cls = "r" if name == "reasons" else "t"
    return f'<td class="{cls}">{text}</td>'


def _plain(value) -> str:
    """A value as a person reads it: no Python ``None``/``True``/``False`` or list brackets."""
    if value is None:
        return "none"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return f"{value:.6g}" if math.isfinite(value) else "not measured"
    if isinstance(value, (list, tuple)):
        return ", ".join(_plain(v) for v in value) if value else "none"
    return str(value)


def _pct(x: float) -> str:
    return f"{x * 100:g} %"


def threshold_rows(limits: Mapping) -> list[tuple[str, str]]:
    """The thresholds of a check, in words and units: (what is checked, the rule)."""
    get = limits.get
    wf = get("warn_fraction", 0.5)
    rows = []
    if get("max_shift_px") is not None:
        lim = float(get("max_shift_px"))
        rows.append(("Shift on the detector (also the stretch's displacement at the ends)",
                     f"fail above {lim:g} px; warn above {wf * lim:g} px ({_pct(wf)} of it)"))
    if get("max_fwhm_change_pct") is not None:
        lim = float(get("max_fwhm_change_pct"))
        rows.append(("Line width (median FWHM) against the reference",
                     f"fail beyond ±{lim:g} %; warn beyond ±{wf * lim:g} %"))
    if get("min_lines") is not None:
        rows.append(("Expected lines found", f"fail below {int(get('min_lines'))} lines"))
    if get("max_missing_fraction") is not None:
        rows.append(("Expected lines missing",
                     f"warn above {_pct(float(get('max_missing_fraction')))} of them"))
    if get("max_masked_samples") is not None:
        rows.append(("Masked samples (NaN, inf) per exposure",
                     f"warn above {int(get('max_masked_samples'))} samples"))
    if get("min_snr") is not None:
        rows.append(("Median signal-to-noise ratio of the matched lines",
                     f"warn below {float(get('min_snr')):g}"))
    if get("detect_snr") is not None:
        rows.append(("Line detection threshold",
                     f"signal-to-noise ratio {float(get('detect_snr')):g}"))
    sat = get("saturation")
    rows.append(("Saturation level", f"{float(sat):g} ADU (counts)" if sat is not None else
                 "as each file states it, or a full-scale ADC value reached by several "
                 "samples; saturated pixels are warned"))  # fmt: skip
    return rows


_REFERENCE_LABELS = {
    "reference_solution": "reference solution",
    "reference_fwhm_px": "reference line FWHM (px)",
    "reference_resolving_power": "reference resolving power λ/Δλ",
    "n_pixels": "detector pixels",
    "medium": "wavelengths in",
    "lamps": "lamps",
    "expected_lines": "expected lines from",
    "line_measurement": "lines measured by",
    "instrument_model": "instrument model",
    "dark": "dark frame",
}


def _meta_rows(items) -> str:
    out = []
    for k, v in items:
        out.append(f"<tr><td>{html.escape(str(k))}</td><td>{html.escape(_plain(v))}</td></tr>")
    return "\n".join(out)


def report_html(summary, info: Mapping, figures: Mapping[str, bytes] | None = None) -> str:
    """The report page as a string (see :func:`report_parts`)."""
    return "\n".join(report_parts(summary, info, figures))


def report_parts(
    summary, info: Mapping, figures: Mapping[str, bytes] | None = None
) -> Iterator[str]:
    """The report page as a sequence of HTML fragments, one table row at a time, so a large
    batch can be written without holding the whole page in memory.

    Parameters
    ----------
    summary : astropy.table.Table
        The summary table from :func:`ritzline.check.check_exposures`.
    info : mapping
        The content of ``summary.json`` (``totals``, ``thresholds``, ``reference``, ...).
    figures : mapping of name -> PNG bytes, optional
        Embedded as ``data:`` URIs, in the order of :data:`FIGURE_FILES`.
    """
    from . import __version__

    totals = dict(info.get("totals", {}))
    n = totals.get("exposures", len(summary))
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        "<title>ritzline batch check</title>",
        f"<style>{_CSS}</style></head><body>",
        "<h1>Batch check of exposures</h1>",
        f"<p>{n} exposure{'s' if n != 1 else ''} checked against the reference solution "
        f"{html.escape(str(info.get('reference', {}).get('reference_solution', '')))} "
        f"with ritzline {html.escape(__version__)}.</p>",
        '<p class="totals">',
        f'<span class="all" data-status="all" title="show all">{n} total</span>',
    ]
    for status in ("pass", "warn", "fail", "error"):
        parts.append(f'<span class="{status}" data-status="{status}" title="show only these">'
                     f"{totals.get(status, 0)} {status}</span>")
    parts.append("</p>")
    if not info.get("complete", True):
        missing = info.get("missing_exposures")
        what = f"{missing} exposures have no result" if missing else \
            "not every exposure has been checked"
        why = html.escape(str(info.get("stopped") or ""))
        parts.append(
            f'<p class="banner"><strong>Incomplete run: this run was interrupted and {what}; '
            f"the totals count only the exposures checked.</strong> {why} Run the same "
            "command again with <code>--resume</code> to check the rest.</p>"
        )
    skipped = info.get("skipped_files") or []
    if skipped:
        names = ", ".join(html.escape(str(p).replace("\\", "/").rsplit("/", 1)[-1])
                          for p in skipped)  # fmt: skip
        parts.append(f"<p>Skipped {len(skipped)} file{'s' if len(skipped) != 1 else ''} that "
                     f"{'are' if len(skipped) != 1 else 'is'} not a spectrum: {names}.</p>")
    parts.append("<h2>Thresholds</h2><table class='meta'>")
    parts.append(_meta_rows(threshold_rows(info.get("thresholds", {}))))
    parts.append("</table><h2>Reference</h2><table class='meta'>")
    reference = info.get("reference", {})
    parts.append(_meta_rows((_REFERENCE_LABELS.get(k, k.replace("_", " ")), v)
                            for k, v in reference.items()))  # fmt: skip
    parts.append(
        "<tr><td>drift model</td><td>"
        + html.escape(str(info.get("drift_model", "")))
        + "</td></tr></table>"
    )
    if figures:
        parts.append("<h2>Figures</h2>")
        for name, (_, caption) in FIGURE_FILES.items():
            png = figures.get(name)
            if png:
                data = base64.b64encode(png).decode("ascii")
                parts.append(
                    f'<figure><img alt="{html.escape(caption)}" src="data:image/png;base64,{data}">'
                    f"<figcaption>{html.escape(caption)}</figcaption></figure>"
                )
    parts.append("<h2>Exposures</h2><p>Errors first, then failures, then warnings; click a "
                 "heading to sort (# is the input order).</p>")
    parts.append(
        '<input id="filter" type="search" placeholder="filter rows (file, status, reason…)">'
    )
    parts.append('<div class="scroll"><table id="rows"><thead><tr>')
    numeric = {"file": False, "status": False, "timestamp": False, "reasons": False}
    for name, heading in _TABLE_COLUMNS:
        num = "1" if numeric.get(name, True) else "0"
        cls = ' class="t"' if not numeric.get(name, True) else ""
        parts.append(f'<th data-num="{num}"{cls} title="sort">{html.escape(heading)}</th>')
    parts.append("</tr></thead><tbody>")
    cols = [name for name, _ in _TABLE_COLUMNS if name in summary.colnames]
    data = {name: summary[name] for name in cols}
    masks = {name: getattr(data[name], "mask", None) for name in cols}
    yield from parts
    statuses = [str(v) for v in summary["status"]]
    order = sorted(range(len(summary)), key=lambda i: (_SEVERITY.get(statuses[i], 4), i))
    err = summary["shift_err_px"] if "shift_err_px" in summary.colnames else None
    expected = summary["n_expected"] if "n_expected" in summary.colnames else None
    for i in order:
        status = html.escape(statuses[i])
        cells = []
        for name, _ in _TABLE_COLUMNS:
            if name not in data:
                cells.append("<td></td>")
                continue
            m = masks[name]
            value = None if (m is not None and bool(m[i])) else data[name][i]
            if name == "status":
                cells.append(f'<td class="t"><span class="{status}">&nbsp;</span> {status}</td>')
            else:
                cell = _cell(name, value)
                if name == "shift_px" and err is not None and math.isfinite(float(err[i])) \
                        and value is not None:
                    cell = cell[:-5] + f' <span class="err">± {float(err[i]):.3f}</span></td>'
                if name == "n_lines" and expected is not None and value is not None:
                    e = expected[i]
                    if not (getattr(expected, "mask", None) is not None
                            and bool(np.ma.getmaskarray(expected)[i])):
                        cell = cell[:-5] + f" / {int(e)}</td>"
                cells.append(cell)
        yield f'<tr class="s-{status}">' + "".join(cells) + "</tr>"
    yield "</tbody></table></div>"
    yield f"<script>{_JS}</script>"
    yield "</body></html>"


def write_report(summary, outdir: str | os.PathLike, info: Mapping) -> Path:
    """Draw the batch figures into ``outdir`` and write ``outdir/report.html``; return its path."""
    from .plots import plot_check_drift, plot_check_fwhm, plot_check_status

    out = Path(outdir)
    thresholds = info.get("thresholds", {})
    reference = info.get("reference", {})
    plot_check_drift(
        summary, out / FIGURE_FILES["drift"][0], max_shift_px=thresholds.get("max_shift_px")
    )
    plot_check_fwhm(
        summary,
        out / FIGURE_FILES["fwhm"][0],
        reference_fwhm_px=reference.get("reference_fwhm_px"),
        max_change_pct=thresholds.get("max_fwhm_change_pct"),
        warn_fraction=thresholds.get("warn_fraction", 0.5),
    )
    plot_check_status(summary, out / FIGURE_FILES["status"][0])
    figures = {name: (out / fname).read_bytes() for name, (fname, _) in FIGURE_FILES.items()}
    path = out / "report.html"
    with atomic_write(path, "w", encoding="utf-8") as fh:
        for part in report_parts(summary, info, figures):
            fh.write(part)
            fh.write("\n")
    return path
