"""Benchmark: reading spectrum files (issue targets: a 4096-sample two-column CSV in
<= 5 ms median after import; 1000 such files read in sequence stay flat in memory).

Peer, side by side: astropy's general-purpose ``Table.read(format="ascii.csv")`` on the
same file, building the same Spectrum.  Run: ``python tests/benchmarks/bench_read.py``.
"""

import resource
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np


def _rss_mb() -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def main() -> None:
    import astropy.units as u
    from astropy.table import Table
    from specutils import Spectrum

    from ritzline import read_spectrum

    rng = np.random.default_rng(7)
    folder = Path(tempfile.mkdtemp(prefix="ritzline-bench-read-"))
    wl = 350.0 + 0.15 * np.arange(4096)
    paths = []
    for k in range(1000):
        counts = rng.poisson(200 + 50 * np.sin(wl / 7.0) ** 2, size=4096)
        path = folder / f"exp_{k:04d}.csv"
        rows = "\n".join(f"{a:.4f},{c}" for a, c in zip(wl, counts, strict=True))
        path.write_text("# Exposure time: 100 ms\nwavelength (nm),counts\n" + rows + "\n")
        paths.append(path)

    read_spectrum(paths[0])  # warm-up: imports, caches

    def timed(func, items):
        times = []
        for p in items:
            t0 = time.perf_counter()
            func(p)
            times.append(time.perf_counter() - t0)
        return statistics.median(times) * 1e3

    def peer(p):
        t = Table.read(p, format="ascii.csv", comment="#")
        return Spectrum(spectral_axis=np.asarray(t.columns[0]) * u.nm,
                        flux=np.asarray(t.columns[1], float) * u.ct)

    ours = timed(read_spectrum, paths[:200])
    theirs = timed(peer, paths[:200])
    print("reading a 4096-sample two-column CSV (median of 200 files)")
    print(f"  ritzline.read_spectrum      {ours:7.2f} ms   (target <= 5 ms)")
    print(f"  astropy Table.read + Spectrum {theirs:5.2f} ms   (general-purpose peer)")

    rss = []
    for k, p in enumerate(paths):
        read_spectrum(p)
        if k in (99, 499, 999):
            rss.append(_rss_mb())
    print("memory while reading 1000 files in sequence (RSS)")
    print(f"  after 100: {rss[0]:.1f} MB   after 500: {rss[1]:.1f} MB   after 1000: {rss[2]:.1f} MB"
          f"   growth 100->1000: {rss[2] - rss[0]:+.1f} MB (target: flat)")


if __name__ == "__main__":
    main()
