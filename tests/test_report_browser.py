"""The HTML batch report in a real headless browser (Debian's ``chromium``): the page loads
without script errors, the inline script runs, the table shows every row, clicking a
heading sorts it, and the page fits a 1280 px wide window (with a screenshot at that size).
Skipped with a message when no Chromium is installed."""

import re
import shutil
import subprocess

import numpy as np
import pytest

from ritzline import check
from ritzline.report import report_html, write_report

pytestmark = pytest.mark.browser

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


def chromium_dom(page, tmp_path, *, window=None, screenshot=None):
    if CHROMIUM is None:
        pytest.skip("headless Chromium not found (Debian: apt-get install chromium)")
    profile = tmp_path / "profile"
    profile.mkdir(exist_ok=True)
    size = [f"--window-size={window[0]},{window[1]}"] if window else []
    shot = [f"--screenshot={screenshot}"] if screenshot else ["--dump-dom"]
    cmd = [
        CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
        "--no-first-run", "--disable-background-networking", "--disable-component-update",
        "--disable-sync", f"--user-data-dir={profile}", "--enable-logging=stderr", "--log-level=0",
        "--hide-scrollbars", "--virtual-time-budget=5000", *size, *shot, page.as_uri(),
    ]  # fmt: skip
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return proc.stdout, proc.stderr


SCRIPT_ERROR = re.compile(r"CONSOLE.*(Uncaught|Error)")


def test_the_browser_check_sees_script_errors(tmp_path):
    # guards the two tests below: a broken script must show up in the browser log
    page = tmp_path / "broken.html"
    page.write_text("<html><body><script>undefinedThing.call();</script></body></html>")
    _, log = chromium_dom(page, tmp_path)
    assert SCRIPT_ERROR.search(log)


def rows(n, bad=()):
    out = []
    for i in range(n):
        r = check._blank_row(f"exp<{i}>.txt")  # markup in a file name must be escaped
        if i in bad:
            r.update(status="error", reasons="exp.txt: file is empty")
        else:
            r.update(status="pass" if i % 3 else "warn", shift_px=0.1 * ((i * 7) % 11) - 0.5,
                     shift_err_px=0.01, fwhm_px=2.6, fwhm_err_px=0.01, n_lines=30,
                     n_expected=31, saturated_pixels=0, snr_median=150.0,
                     timestamp=f"2026-03-14T08:{i:02d}:00")  # fmt: skip
        r["index"] = i
        out.append(r)
    return out


INFO = {"totals": {"exposures": 25, "pass": 16, "warn": 7, "fail": 0, "error": 2},
        "thresholds": {"max_shift_px": 1.0, "max_fwhm_change_pct": 15.0, "min_lines": 5,
                       "max_missing_fraction": 0.2, "max_masked_samples": 0, "min_snr": 10.0,
                       "detect_snr": 5.0, "warn_fraction": 0.5, "saturation": None},
        "reference": {"reference_solution": "ref.json", "reference_fwhm_px": 2.6,
                      "lamps": ["Hg", "Ar"], "dark": False},
        "complete": True}  # fmt: skip


def test_report_loads_without_errors_and_shows_every_row(tmp_path):
    table = check.summary_table(rows(25, bad={3, 9}))
    page = write_report(table, tmp_path, INFO)
    dom, log = chromium_dom(page, tmp_path)
    assert 'data-ritzline-ready="25"' in dom
    assert len(re.findall(r'<tr class="s-', dom)) == 25
    assert "exp&lt;3&gt;.txt" in dom and "<3>" not in dom
    assert dom.count("data:image/png;base64,") == 3
    assert not SCRIPT_ERROR.search(log), log[-2000:]


def test_report_sorts_by_a_numeric_column_when_its_heading_is_clicked(tmp_path):
    table = check.summary_table(rows(12))
    html = report_html(table, INFO)
    # the test drives the page: click "shift (px)" once, then record the row order
    probe = """<script>
    var th=[].find.call(document.querySelectorAll('#rows th'),function(h){
      return h.textContent==='shift (px)';});
    th.click();
    var col=[].indexOf.call(th.parentNode.cells, th);
    var v=[].map.call(document.getElementById('rows').tBodies[0].rows,function(r){
      return r.cells[col].getAttribute('data-v');});
    document.body.setAttribute('data-sorted', v.join(' '));
    </script></body>"""
    page = tmp_path / "report.html"
    page.write_text(html.replace("</body>", probe), encoding="utf-8")
    dom, _ = chromium_dom(page, tmp_path)
    shown = [float(v) for v in re.search(r'data-sorted="([^"]*)"', dom).group(1).split()]
    assert shown == sorted(np.asarray(table["shift_px"], float).tolist())


def test_clicking_a_status_total_shows_only_those_exposures(tmp_path):
    table = check.summary_table(rows(12, bad={2, 5}))
    html = report_html(table, INFO)
    probe = """<script>
    document.querySelector('.totals [data-status="error"]').click();
    var shown=[].filter.call(document.getElementById('rows').tBodies[0].rows,function(r){
      return r.style.display!=='none';}).map(function(r){return r.cells[0].textContent;});
    document.body.setAttribute('data-shown', shown.join(' '));
    </script></body>"""
    page = tmp_path / "report.html"
    page.write_text(html.replace("</body>", probe), encoding="utf-8")
    dom, _ = chromium_dom(page, tmp_path)
    assert re.search(r'data-shown="([^"]*)"', dom).group(1).split() == ["2", "5"]


def long_rows(n):
    """Rows as a real batch makes them: long file paths, long reasons, every column set."""
    out = rows(n, bad={1})
    for i, r in enumerate(out):
        r["file"] = f"/data/lab/spectrometer-2/2026-03-14/morning-series/lamp_exposure_{i:05d}.csv"
        if r["status"] == "warn":
            r["reasons"] = ("shift +0.612 ± 0.004 px is above 50% of the limit (1 px); FWHM "
                            "2.870 px is +9.1% vs the reference, above 50% of the limit (±15%); "
                            "3 of 36 expected lines missing (546.074, 576.960, 579.066 nm)")
        r.update(shift_nm=0.0123, stretch=1.2e-5, fwhm_change_pct=9.1, resolving_power=1296.0,
                 n_expected=36, masked_samples=0)
    return out


def test_report_fits_a_1280_px_window(tmp_path):
    table = check.summary_table(long_rows(25))
    html = report_html(table, INFO)
    probe = """<script>
    var d=document.documentElement, t=document.getElementById('rows');
    document.body.setAttribute('data-fit', [window.innerWidth, d.scrollWidth,
      Math.ceil(t.getBoundingClientRect().right)].join(' '));
    </script></body>"""
    page = tmp_path / "report.html"
    page.write_text(html.replace("</body>", probe), encoding="utf-8")
    dom, _ = chromium_dom(page, tmp_path, window=(1280, 900))
    inner, scroll, right = map(int, re.search(r'data-fit="([^"]*)"', dom).group(1).split())
    assert inner == 1280
    assert scroll <= inner and right <= inner, f"page {scroll} px, table to {right} px"
    shot = tmp_path / "report-1280.png"
    chromium_dom(page, tmp_path, window=(1280, 900), screenshot=shot)
    png = shot.read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    # IHDR: width and height of the screenshot (PNG specification, section 11.2.2)
    assert int.from_bytes(png[16:20], "big") == 1280
    assert int.from_bytes(png[20:24], "big") == 900


def test_report_lists_the_worst_first_and_thresholds_in_words(tmp_path):
    table = check.summary_table(long_rows(9))
    html = report_html(table, INFO)
    page = tmp_path / "report.html"
    page.write_text(html, encoding="utf-8")
    dom, _ = chromium_dom(page, tmp_path)
    shown = re.findall(r'<tr class="s-(\w+)"', dom)
    assert shown[0] == "error" and shown.index("pass") > max(
        i for i, s in enumerate(shown) if s == "warn")
    meta = dom[dom.index("<h2>Thresholds</h2>"):dom.index("<h2>Exposures</h2>")]
    for python_word in ("None", "False", "True", "[", "max_shift_px"):
        assert python_word not in meta
    assert "fail above 1 px; warn above 0.5 px" in meta
    assert "fail beyond ±15 %; warn beyond ±7.5 %" in meta
