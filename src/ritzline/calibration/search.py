"""Finding candidate maps without a guess: spacing-ratio votes of line quadruplets, and for
lamps with few lines, every pair of strong detections against every pair of listed lines.

Each finder returns candidate correspondence sets (detection index, reference index) and
the number of distinct candidate maps it examined: the look-elsewhere factor of the search.
"""

from __future__ import annotations

import numpy as np

from .fit import CURVATURE_PRIOR
from .inputs import Lines, Refs

# Plausible dispersions of a grating spectrometer, nm per pixel (common practice: from
# ~0.005 nm/px echelle-like to ~2 nm/px survey instruments).
DISPERSION_LIMITS = (0.003, 3.0)


def quads(pos: np.ndarray, ahead: int, min_gap: float):
    """Index quadruplets (anchor + 3 of its next ``ahead`` neighbours) and their two
    spacing-ratio invariants."""
    from itertools import combinations

    n = pos.size
    if n < 4:
        return np.zeros((0, 4), int), np.zeros((0, 2))
    combos = np.array(list(combinations(range(1, ahead + 1), 3)))
    i = np.arange(n)[:, None]
    idx = np.stack(
        [np.broadcast_to(i, (n, len(combos))), i + combos[:, 0], i + combos[:, 1],
         i + combos[:, 2]],
        axis=-1,
    ).reshape(-1, 4)
    idx = idx[idx[:, 3] < n]
    pq = pos[idx]
    gaps = np.diff(pq, axis=1)
    # near-coincident members (unresolved multiplets) make the ratios meaningless
    ok = (gaps.min(axis=1) >= min_gap) & (gaps.min(axis=1) >= 0.005 * (pq[:, 3] - pq[:, 0]))
    idx, pq = idx[ok], pq[ok]
    span = pq[:, 3] - pq[:, 0]
    inv = np.stack([(pq[:, 1] - pq[:, 0]) / span, (pq[:, 2] - pq[:, 0]) / span], axis=1)
    return idx, inv


def vote_cells(det: Lines, ref: Refs, wrange, *, max_lines=60, max_seeds=6):
    """Vote over (direction, dispersion, central wavelength) from matched quadruplets; return
    the best cells' correspondence sets and the number of distinct cells voted for (the
    candidate maps the search looked at).  The ratio tolerance covers the centroid noise
    and the curvature prior over the quadruplet's span."""
    from scipy.spatial import cKDTree

    n = det.n_pixels
    pc = (n - 1) / 2.0
    strong = np.arange(det.pixel.size)
    if strong.size > max_lines:
        score = np.where(np.isfinite(det.flux), det.flux, 0.0)
        strong = np.sort(np.argsort(score)[::-1][:max_lines])
    pos = det.pixel[strong]
    dq, dinv = quads(pos, 5, 1.0)
    rq, rinv = quads(ref.wavelength, 8, 0.0)
    if len(dq) == 0 or len(rq) == 0:
        return [], 0
    rtree = cKDTree(rinv)
    votes = []
    for direction in (1, -1):
        q_inv = dinv if direction == 1 else np.stack([1 - dinv[:, 1], 1 - dinv[:, 0]], 1)
        span_px = pos[dq[:, 3]] - pos[dq[:, 0]]
        span_x = 2 * span_px / (n - 1)
        tol = np.clip(4.0 * np.sqrt(2) * 0.1 / span_px + 0.004, 0.004, 0.03)
        tol = tol + 0.5 * CURVATURE_PRIOR[0] * span_x
        dtree = cKDTree(q_inv)
        pairs = dtree.sparse_distance_matrix(rtree, float(tol.max()), output_type="ndarray")
        if pairs.size == 0:
            continue
        qi, rj, dist = pairs["i"], pairs["j"], pairs["v"]
        keep = dist < tol[qi]
        qi, rj = qi[keep], rj[keep]
        dquad = dq[qi]
        rquad = rq[rj]
        d = (ref.wavelength[rquad[:, 3]] - ref.wavelength[rquad[:, 0]]) / (
            pos[dquad[:, 3]] - pos[dquad[:, 0]]
        )
        if direction == 1:
            lc = ref.wavelength[rquad[:, 0]] + d * (pc - pos[dquad[:, 0]])
            det_order = dquad
        else:
            lc = ref.wavelength[rquad[:, 0]] - d * (pc - pos[dquad[:, 3]])
            det_order = dquad[:, ::-1]
        lo = lc - d * pc
        hi = lc + d * pc
        width = hi - lo
        ok = (
            (d > DISPERSION_LIMITS[0])
            & (d < DISPERSION_LIMITS[1])
            & (lo > wrange[0] - 0.1 * width)
            & (hi < wrange[1] + 0.1 * width)
        )
        votes.append((direction, d[ok], lc[ok], strong[det_order[ok]], rquad[ok]))
    if sum(v[1].size for v in votes) == 0:
        return [], 0
    cells, occupied = [], set()
    bw_ld, bw_lc = 0.04, 0.02
    for direction, d, lc, dpairs, rpairs in votes:
        ld = np.log(d)
        for off_a in (0.0, 0.5):
            a = np.floor(ld / bw_ld + off_a).astype(np.int64)
            d_cell = np.exp((a - off_a + 0.5) * bw_ld)
            for off_b in (0.0, 0.5):
                b = np.floor(lc / (bw_lc * d_cell * n) + off_b).astype(np.int64)
                key = a * 10_000_000 + b
                uniq, inverse, counts = np.unique(key, return_inverse=True, return_counts=True)
                if off_a == 0.0 and off_b == 0.0:
                    occupied.update((direction * uniq).tolist())
                top = np.argsort(counts)[::-1][:max_seeds]
                for t in top:
                    if counts[t] < 2:
                        continue
                    sel = inverse == t
                    cells.append((int(counts[t]), direction, dpairs[sel], rpairs[sel],
                                  float(np.median(d[sel]))))
    cells.sort(key=lambda c: -c[0])
    seeds, seen = [], []
    for count, direction, dp, rp, d_cell in cells:
        pairs = np.unique(np.stack([dp.ravel(), rp.ravel()], 1), axis=0)
        sig = (direction, pairs.shape[0], int(pairs[:, 0].sum()), int(pairs[:, 1].sum()))
        if sig in seen:
            continue
        seen.append(sig)
        seeds.append((count, direction, pairs, d_cell))
        if len(seeds) >= max_seeds:
            break
    return seeds, len(occupied)


def _one_to_one(pairs: np.ndarray, order: np.ndarray) -> np.ndarray:
    """The first pair (in ``order``) of each detection, then of each listed line."""
    key = pairs[order]
    _, first = np.unique(key[:, 0], return_index=True)
    key = key[np.sort(first)]
    _, first = np.unique(key[:, 1], return_index=True)
    return key[np.sort(first)]


def initial_pairs(pairs: np.ndarray):
    """One reference per detection and one detection per reference, by vote count."""
    key, counts = np.unique(pairs, axis=0, return_counts=True)
    key = _one_to_one(key, np.argsort(-counts, kind="stable"))
    return key[:, 0], key[:, 1]


def pair_starts(det: Lines, ref: Refs, wrange, *, max_lines=12, keep=20):
    """For lamps with few lines: every pair of strong detections taken as every pair of
    listed lines (both directions) inside the plausible dispersions gives a linear map;
    the other strong detections vote for it when a listed line lies within the window the
    curvature prior allows around the chord.  Returns the starts of the ``keep`` best
    distinct maps and the number of distinct maps examined."""
    n = det.n_pixels
    flux = np.where(np.isfinite(det.flux), det.flux, 0.0)
    strong = np.sort(np.argsort(flux)[::-1][:max_lines])
    p = det.pixel[strong]
    x = 2 * p / (n - 1) - 1
    ia, ib = np.triu_indices(p.size, 1)
    far = p[ib] - p[ia] >= 0.05 * (n - 1)
    ia, ib = ia[far], ib[far]
    w = ref.wavelength
    ka, kb = np.triu_indices(w.size, 1)
    same = (ref.frame[ka] == ref.frame[kb]) & (w[kb] - w[ka] > 0)
    ka, kb = ka[same], kb[same]
    if ia.size == 0 or ka.size == 0:
        return [], 0
    fw = det.fwhm_median if np.isfinite(det.fwhm_median) else 3.0
    starts, cells = [], {}
    for direction in (1, -1):
        da = np.repeat(ia, ka.size)
        db = np.repeat(ib, ka.size)
        ra = np.tile(ka if direction == 1 else kb, ia.size)
        rb = np.tile(kb if direction == 1 else ka, ia.size)
        ok = (det.frame[strong[da]] == ref.frame[ra])
        d = (w[rb] - w[ra]) / (p[db] - p[da])
        lo = w[ra] - d * p[da]
        hi = lo + d * (n - 1)
        ok &= (np.abs(d) > DISPERSION_LIMITS[0]) & (np.abs(d) < DISPERSION_LIMITS[1])
        ok &= (np.minimum(lo, hi) > wrange[0] - 0.1 * np.abs(hi - lo))
        ok &= (np.maximum(lo, hi) < wrange[1] + 0.1 * np.abs(hi - lo))
        da, db, ra, rb, d, lo = da[ok], db[ok], ra[ok], rb[ok], d[ok], lo[ok]
        if d.size == 0:
            continue
        lam = lo[:, None] + d[:, None] * p[None, :]
        near, dist_px = _nearest(w, lam, d)
        bow = np.abs((x[None, :] - x[da][:, None]) * (x[None, :] - x[db][:, None]))
        tol = 2 * fw + 1.5 * CURVATURE_PRIOR[0] * (n - 1) * bow
        cols = np.arange(p.size)[None, :]
        hit = (dist_px < tol) & (cols != da[:, None]) & (cols != db[:, None])
        key = np.stack([np.round(np.log(np.abs(d)) / 0.01),
                        np.round((lo + d * (n - 1) / 2) / (0.002 * np.abs(d) * n))], 1)
        for k in map(tuple, np.unique(key[hit.sum(1) >= 1], axis=0)):
            cells[(direction, *k)] = True
        # the chord bends: curvature through the two anchors, fitted to the lines it hit
        lam = _bend(lam, w[near], hit, x, x[da], x[db], d * (n - 1) / 2, fw * np.abs(d))
        near, dist_px = _nearest(w, lam, d)
        fine = (cols != da[:, None]) & (cols != db[:, None]) & (dist_px < 2 * fw)
        score = np.sum(np.where(fine, np.exp(-0.5 * (dist_px / fw) ** 2), 0.0), axis=1)
        top = np.argsort(-score)[: 4 * keep]
        for t in top:
            if fine[t].sum() < 2:
                break
            m = np.flatnonzero(fine[t])
            di = np.r_[strong[da[t]], strong[db[t]], strong[m]]
            ri = np.r_[ra[t], rb[t], near[t, m]]
            starts.append((float(score[t]), di, ri))
    starts.sort(key=lambda s: -s[0])
    out, seen = [], set()
    for _, di, ri in starts:
        sig = tuple(sorted(zip(di.tolist(), ri.tolist(), strict=True)))
        if sig in seen:
            continue
        seen.add(sig)
        out.append((di, ri))
        if len(out) >= keep:
            break
    return out, len(cells)


def _nearest(w: np.ndarray, lam: np.ndarray, d: np.ndarray):
    """Index of the listed line nearest each predicted wavelength, and the distance in
    pixels (rows of ``lam`` have dispersions ``d``)."""
    j = np.clip(np.searchsorted(w, lam), 1, w.size - 1)
    near = np.where(np.abs(lam - w[j - 1]) < np.abs(lam - w[j]), j - 1, j)
    return near, np.abs(lam - w[near]) / np.abs(d)[:, None]


def _bend(lam, target, hit, x, xa, xb, c1, sig_nm):
    """Chords bent by quadratic and cubic terms that keep their two anchors: the terms are
    fitted (per row, under the curvature prior) to the listed lines the chord hit."""
    g2 = (x[None, :] - xa[:, None]) * (x[None, :] - xb[:, None])
    g = np.stack([g2, g2 * x[None, :]], axis=-1)  # rows x lines x 2
    # (x - xa)(x - xb) carries 2 c2 of a Chebyshev map, x (x - xa)(x - xb) carries 4 c3
    prior = np.abs(c1)[:, None] * np.array([2 * CURVATURE_PRIOR[0], 4 * CURVATURE_PRIOR[1]])
    wgt = hit / sig_nm[:, None] ** 2
    a = np.einsum("rl,rli,rlj->rij", wgt, g, g) + np.eye(2)[None] / prior[:, :, None] ** 2
    b = np.einsum("rl,rli,rl->ri", wgt, g, target - lam)
    q = np.linalg.solve(a, b[..., None])[..., 0]
    return lam + np.einsum("rli,ri->rl", g, q)
