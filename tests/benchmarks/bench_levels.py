"""Benchmark of the Ritz line lists (issue 3 targets), printed as measured vs target.

* every E1 transition of one species in 200–1100 nm: ≤ 50 ms (worst species, cold: tables
  already read from disk, transitions computed from the levels; and warm: cached);
* all eight species loaded from disk and cached for matching: ≤ 200 ms total.

Peers, side by side: astropy's general ECSV reader for loading the shipped tables, and
specutils' ``air_to_vac`` for the air → vacuum conversion.

Run: ``python tests/benchmarks/bench_levels.py``.  Timings are the median of several
repeats; on a shared machine they are noisy.
"""

import statistics
import time

from ritzline import levels

REPEATS = 7
TARGET_ONE_MS = 50.0
TARGET_ALL_MS = 200.0
RANGE = (200.0, 1100.0)


def _ms(func, setup=None, repeats: int = REPEATS) -> float:
    times = []
    for _ in range(repeats):
        if setup is not None:
            setup()
        start = time.perf_counter()
        func()
        times.append((time.perf_counter() - start) * 1e3)
    return statistics.median(times)


def _forget_transitions() -> None:
    levels._species_transitions.cache_clear()
    levels._species_table.cache_clear()
    levels._species_pairs.cache_clear()


def _load_all() -> None:
    for label in levels.SPECIES:
        levels.transitions(label, wavelength_range=RANGE)


def main() -> None:
    import astropy.table  # noqa: F401  (import cost is not part of the targets)

    _load_all()  # warm the imports
    print(f"{'measurement':58s} {'measured':>10s} {'target':>10s}  verdict")
    worst_cold = worst_warm = 0.0
    for label in levels.SPECIES:
        cold = _ms(
            lambda label=label: levels.transitions(label, wavelength_range=RANGE),
            setup=_forget_transitions,
        )
        warm = _ms(lambda label=label: levels.transitions(label, wavelength_range=RANGE))
        n = len(levels.transitions(label, wavelength_range=RANGE))
        worst_cold, worst_warm = max(worst_cold, cold), max(worst_warm, warm)
        print(
            f"  {label:5s} {n:4d} transitions 200-1100 nm, computed / cached"
            f"{'':8s} {cold:6.1f} / {warm:4.1f} ms"
        )
    for name, value, target in (
        (
            "one species, all E1 transitions 200-1100 nm (worst, computed)",
            worst_cold,
            TARGET_ONE_MS,
        ),
        ("one species, all E1 transitions 200-1100 nm (worst, cached)", worst_warm, TARGET_ONE_MS),
        (
            "all eight species read from disk and cached",
            _ms(_load_all, setup=levels._clear_caches),
            TARGET_ALL_MS,
        ),
    ):
        verdict = "ok" if value <= target else "MISSED"
        print(f"{name:58s} {value:7.1f} ms {target:7.0f} ms  {verdict}")
    print()
    print("side by side with general-purpose peers")
    print(f"{'measurement':58s} {'ritzline':>10s} {'peer':>10s}  peer")
    files = sorted(p.name for p in levels.data_path("line_lists").glob("*.ecsv"))
    ours = _ms(lambda: [levels._read_ecsv(f) for f in files])
    peer = _ms(
        lambda: [levels._read_ecsv_astropy(levels.data_path("line_lists", f)) for f in files]
    )
    print(
        f"{f'read the {len(files)} shipped ECSV tables':58s} {ours:7.1f} ms {peer:7.1f} ms  "
        "astropy Table.read"
    )
    import astropy.units as u
    import numpy as np
    from specutils.utils.wcs_utils import air_to_vac

    from ritzline.airvac import air_to_vacuum

    grid = np.linspace(200.0, 1100.0, 100_000)
    ours = _ms(lambda: air_to_vacuum(grid))
    peer = _ms(lambda: air_to_vac(grid * u.nm))
    print(
        f"{'air -> vacuum, 100 000 wavelengths':58s} {ours:7.1f} ms {peer:7.1f} ms  "
        "specutils air_to_vac (Morton 2000)"
    )
    print(f"(median of {REPEATS} runs; shared machine, timings noisy)")


if __name__ == "__main__":
    main()
