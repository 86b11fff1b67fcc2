"""Benchmark of line identification on discharge spectra whose wavelength axis is off.

Run: ``python tests/benchmarks/bench_identify_axis.py CASES_DIR [--shift-px 2] [--limit N]``
(or set ``RITZ_BENCH_CASES``; the folder holds ``discharge_NNN.csv`` and
``discharge_NNN.truth.json`` pairs with the truth of each spectrum).

Each spectrum's written wavelength axis is moved by ``--shift-px`` pixels of its local
dispersion (a line at pixel p is labelled with the axis value of p + shift), and
``identify_lines`` is told how far off the axis may be (``--axis-err-px``, default
``|shift| + 0.5`` px).  With ``--shift-px 0`` and no ``--axis-err-px`` the spectrum's own
default uncertainty is used.  All shipped species are candidates.

Scoring follows the published rules of the discharge suite (written here from their
description): an assignment counts when its probability is >= 0.5; it is right when its
species matches a real truth line whose listed wavelength agrees within
``min(tol, max(0.01 nm, 0.25 FWHM))`` and whose position on the written axis agrees within
``tol`` + the axis error there, ``tol = clip(3 CRLB, 0.5 FWHM, 1 FWHM)``; each truth line is
claimed once.  Recall counts resolved, listed truth lines with SNR >= 5 away from the axis
ends (components closer than 0.25 FWHM count as one).  Printed: precision, recall, species
calls, mean probability of right and wrong assignments, and the reliability table (every
line's best hypothesis, in probability bins: mean p against the fraction right).
"""

from __future__ import annotations

import argparse
import itertools
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def _sp(name: str) -> str:
    """Truth species "Ne_I" -> the project's label "Ne I"."""
    return name.replace("_", " ") if name else ""


def shifted_case(csv: Path, truth: dict, shift_px: float, out_dir: Path):
    """Write the spectrum with its axis moved by ``shift_px`` pixels; return the path, the
    written axis and the total axis error per pixel (px)."""
    data = np.genfromtxt(csv, delimiter=",", names=True)
    wl = np.asarray(data["wavelength_nm"], float)
    counts = np.asarray(data["counts"], float)
    pix = np.arange(wl.size, dtype=float)
    c = (wl.size - 1) / 2.0
    ae = truth.get("axis_error") or {}
    err_px = ae.get("d0_px", 0.0) + ae.get("d1_px", 0.0) * (pix - c) / c
    if shift_px:
        # extrapolate the axis linearly beyond its ends so every pixel gets a value
        ext = np.r_[pix[0] - 8 + np.arange(8), pix, pix[-1] + 1 + np.arange(8)]
        lo_d, hi_d = wl[1] - wl[0], wl[-1] - wl[-2]
        ext_wl = np.r_[wl[0] + (ext[:8] - pix[0]) * lo_d, wl, wl[-1] + (ext[-8:] - pix[-1]) * hi_d]
        wl = np.interp(pix + shift_px, ext, ext_wl)
        err_px = err_px + shift_px
    path = out_dir / csv.name
    with open(path, "w") as fh:
        fh.write("wavelength_nm,counts\n")
        for a, b in zip(wl, counts, strict=True):
            fh.write(f"{a:.6f},{b:.3f}\n")
    return path, wl, err_px


def score_case(ident, truth: dict, axis_wl: np.ndarray, err_px: np.ndarray):
    """Per-case counts and the (p, right) pairs of every line's best hypothesis."""
    lines = [ln for ln in truth["lines"] if ln.get("on_detector", True)]
    pix = np.arange(axis_wl.size, dtype=float)
    disp = np.abs(np.gradient(axis_wl))
    t_pix = np.array([ln["pixel"] for ln in lines], float)
    t_obs = np.interp(t_pix, pix, axis_wl)
    t_err = np.abs(np.interp(t_pix, pix, err_px * disp))
    t_fwhm = np.array([ln["fwhm_nm"] for ln in lines], float)
    t_d = np.interp(t_pix, pix, disp)
    tol = np.clip(3 * np.array([ln["crlb_px"] for ln in lines]) * t_d, 0.5 * t_fwhm, t_fwhm)
    ref_tol = np.minimum(tol, np.maximum(0.01, 0.25 * t_fwhm))
    t_sp = [_sp(ln.get("species") or "") for ln in lines]
    t_ref = np.array([ln.get("ref_wavelength_nm") or np.nan for ln in lines], float)
    real = np.array([bool(ln.get("real")) for ln in lines])
    kind = [ln.get("kind", "") for ln in lines]
    # second-order images: parent = the listed line at half the ghost's wavelength
    par_ref = np.array([0.5 * ln["wavelength_nm"] if k == "second_order" else np.nan
                        for ln, k in zip(lines, kind, strict=True)])

    t = ident.lines
    sp = np.asarray(t["species"], str)
    p = np.asarray(t["probability"], float)
    wl = np.asarray(t["wavelength"], float)
    ref = np.asarray(t["ref_wavelength"], float)
    order = np.asarray(t["order"], int) if "order" in t.colnames else np.ones(len(t), int)
    flux = np.asarray(t["flux"], float) if "flux" in t.colnames else np.ones(len(t))
    best_sp = np.asarray(t["best_species"], str) if "best_species" in t.colnames else sp
    best_ref = np.asarray(t["best_ref_wavelength"], float) if "best_ref_wavelength" in \
        t.colnames else ref
    best_order = np.asarray(t["best_order"], int) if "best_order" in t.colnames else order

    def right_for(rows, sps, refs, orders):
        claimed = np.zeros(len(lines), bool)
        ok = np.zeros(len(rows), bool)
        for j in sorted(range(len(rows)), key=lambda j: -p[rows[j]]):
            i = rows[j]
            near = np.abs(wl[i] - t_obs) <= tol + t_err
            if orders[i] == 2:
                m = near & np.array([k == "second_order" for k in kind]) & (
                    np.abs(refs[i] - par_ref) <= ref_tol)
            else:
                m = near & real & np.array([s == sps[i] for s in t_sp]) & (
                    np.abs(refs[i] - t_ref) <= ref_tol) & np.array(
                    [k != "second_order" for k in kind])
            m &= ~claimed
            if m.any():
                k = np.flatnonzero(m)[np.argmin(np.abs(wl[i] - t_obs[m]))]
                claimed[k] = True
                ok[j] = True
        return ok, claimed

    counted = np.flatnonzero((sp != "") & (p >= 0.5) & (flux > 0))
    ok, claimed = right_for(counted, sp, ref, order)
    # recall: resolved listed lamp lines, SNR >= 5, not within half a FWHM of the ends
    n = axis_wl.size
    fwhm_px = np.array([ln["fwhm_px"] for ln in lines], float)
    sat = np.array([bool(ln.get("saturated")) for ln in lines])
    eligible = (real & np.array([bool(ln.get("resolved")) for ln in lines])
                & np.array([bool(ln.get("in_reference")) for ln in lines])
                & np.array([ln.get("snr", 0) >= 5 for ln in lines])
                & (t_pix >= -0.5 + 0.5 * fwhm_px) & (t_pix <= n - 0.5 - 0.5 * fwhm_px)
                & np.array([k != "second_order" for k in kind]))
    for i in np.flatnonzero(eligible & sat):  # two saturated lines merged: not countable
        if np.any(sat & (np.abs(t_pix - t_pix[i]) < fwhm_px[i]) & (np.arange(len(lines)) != i)):
            eligible[i] = False
    found = 0
    features = 0
    done = np.zeros(len(lines), bool)
    for i in np.flatnonzero(eligible):
        if done[i]:
            continue
        comp = real & (np.abs(t_obs - t_obs[i]) < 0.25 * t_fwhm[i])
        done |= comp & eligible
        features += 1
        found += bool(np.any(claimed & comp))
    # reliability: every line's best hypothesis, claimed or not
    hyp = np.flatnonzero(best_sp != "")
    ok_h, _ = right_for(hyp, best_sp, best_ref, best_order)
    present = {s for s in t_sp if s}
    return {
        "assigned": counted.size, "correct": int(ok.sum()), "features": features,
        "found": found, "p_right": p[counted][ok].tolist(), "p_wrong": p[counted][~ok].tolist(),
        "rel": list(zip(p[hyp].tolist(), ok_h.tolist(), strict=True)),
        "present": present, "claimed": set(ident.present),
        "missed_lines": [(t_sp[i], round(float(t_ref[i]), 3)) for i in np.flatnonzero(
            eligible & ~claimed)],
        "wrong_rows": [(sp[i], round(float(ref[i]), 3), round(float(p[i]), 2))
                       for i, good in zip(counted, ok, strict=True) if not good],
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("cases", nargs="?", default=os.environ.get("RITZ_BENCH_CASES"),
                    help="folder of discharge_NNN.csv + .truth.json (or RITZ_BENCH_CASES)")
    ap.add_argument("--shift-px", type=float, default=2.0, help="extra axis shift (px)")
    ap.add_argument("--axis-err-px", type=float, default=None,
                    help="axis uncertainty told to identify_lines (px); default |shift| + 0.5")
    ap.add_argument("--limit", type=int, default=None, help="first N cases only")
    ap.add_argument("-v", "--verbose", action="store_true", help="per-case detail")
    args = ap.parse_args()
    if not args.cases:
        sys.exit("give the discharge cases folder (argument or RITZ_BENCH_CASES)")
    import astropy.units as u

    import ritzline
    from ritzline.identify import SHIPPED_SPECIES

    csvs = sorted(Path(args.cases).glob("discharge_*.csv"))[: args.limit]
    axis_err = args.axis_err_px
    if axis_err is None and args.shift_px:
        axis_err = abs(args.shift_px) + 0.5
    tot = {"assigned": 0, "correct": 0, "features": 0, "found": 0}
    p_right, p_wrong, rel = [], [], []
    calls = calls_ok = 0
    times = []
    with tempfile.TemporaryDirectory() as tmp:
        for csv in csvs:
            truth = json.loads(csv.with_suffix("").with_suffix(".truth.json").read_text())
            path, axis_wl, err_px = shifted_case(csv, truth, args.shift_px, Path(tmp))
            spec = ritzline.read_spectrum(path)
            kw = {} if axis_err is None else {"axis_err": axis_err * u.pix}
            t0 = time.perf_counter()
            ident = ritzline.identify_lines(spec, species=list(SHIPPED_SPECIES), **kw)
            times.append(time.perf_counter() - t0)
            r = score_case(ident, truth, axis_wl, err_px)
            for k in tot:
                tot[k] += r[k]
            p_right += r["p_right"]
            p_wrong += r["p_wrong"]
            rel += r["rel"]
            for s in SHIPPED_SPECIES:
                calls += 1
                calls_ok += (s in r["present"]) == (s in r["claimed"])
            if args.verbose:
                corr = ident.meta.get("axis_correction", {})
                print(f"# {csv.stem} present={sorted(r['present'])} "
                      f"claimed={sorted(r['claimed'])} found={r['found']}/{r['features']} "
                      f"wrong={r['wrong_rows']} missed={r['missed_lines']} "
                      f"axis offset {corr.get('offset', 0):+.3f} tilt {corr.get('tilt', 0):+.3f} "
                      f"{corr.get('unit')} (err {corr.get('offset_err', 0):.3f})")
    prec = tot["correct"] / max(tot["assigned"], 1)
    rec = tot["found"] / max(tot["features"], 1)
    print(f"axis shift {args.shift_px:+.1f} px, axis uncertainty told: "
          f"{'default' if axis_err is None else f'{axis_err:.1f} px'}, cases {len(csvs)}")
    print(f"line precision {prec:.3f} (target >= 0.99), {tot['correct']}/{tot['assigned']}")
    print(f"line recall    {rec:.3f} (target >= 0.95), {tot['found']}/{tot['features']}")
    print(f"species calls  {calls_ok / max(calls, 1):.3f} correct (target >= 0.99)")
    print(f"mean p right {np.mean(p_right) if p_right else float('nan'):.3f}, "
          f"mean p wrong {np.mean(p_wrong) if p_wrong else float('nan'):.3f} (target <= 0.6)")
    print(f"time per spectrum median {np.median(times):.3f} s")
    print("reliability (every line's best hypothesis): bin, n, mean p, fraction right, |diff|")
    pp = np.array([a for a, _ in rel])
    ok = np.array([b for _, b in rel], float)
    edges = np.array([0.0, 0.1, 0.3, 0.5, 0.7, 0.9, 0.97, 1.0001])
    for lo, hi in itertools.pairwise(edges):
        m = (pp >= lo) & (pp < hi)
        if m.any():
            d = abs(pp[m].mean() - ok[m].mean())
            print(f"  [{lo:.2f}, {min(hi, 1):.2f})  {m.sum():5d}  {pp[m].mean():.3f}  "
                  f"{ok[m].mean():.3f}  {d:.3f}{'  > 0.05' if d > 0.05 else ''}")


if __name__ == "__main__":
    main()
