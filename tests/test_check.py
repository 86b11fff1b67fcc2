"""Batch checking: drift fit, status rules, journal/resume, ordering, pool and Dask runners,
outputs and the CLI.

Reference values for the drift model are synthetic truths (known shifts put into the
data); everything else checks our own bookkeeping against what was put in.
"""

import contextlib
import json
import multiprocessing
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

import _check_synthetic as cs
from ritzline import check
from ritzline.check import (
    CheckLimits,
    collect_exposures,
    fit_drift,
    judge,
    read_journal,
    run_batch,
    summary_table,
)
from ritzline.errors import RitzlineError

N_PIX = 3648
CENTRE = (N_PIX - 1) / 2


# ---- a tiny task for runner tests: each "exposure" is a JSON file with a number ----------


class NumberTask:
    """Reads ``{"value": x}`` and returns a summary row; unreadable files become errors."""

    def __init__(self, delay: float = 0.0):
        self.delay = delay

    def __call__(self, path):
        row = check._blank_row(str(path))
        if self.delay:
            time.sleep(self.delay)
        try:
            value = json.loads(Path(path).read_text())["value"]
        except (OSError, ValueError, KeyError) as exc:
            row["status"] = "error"
            row["reasons"] = f"{path}: {exc}"
            return row
        if value == "die" and multiprocessing.parent_process() is not None:
            os._exit(3)  # a helper process killed mid-run (out of memory, say)
        if value == "die":
            value = -1
        row["status"] = "pass"
        row["shift_px"] = float(value)
        row["n_lines"] = int(value)
        row["timestamp"] = f"2026-01-01T00:00:{int(value) % 60:02d}"
        return row


def write_numbers(folder: Path, n: int, bad=()) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for i in range(n):
        p = folder / f"exp{i}.json"
        p.write_text("not json" if i in bad else json.dumps({"value": i}))
        paths.append(p)
    return paths


# ---- drift fit -----------------------------------------------------------------------------


def synthetic_lines(rng, shift, stretch, n=40, err=0.01, extra=5, drop=4):
    ref = np.sort(rng.uniform(20, N_PIX - 20, n))
    found = ref + shift + stretch * (ref - CENTRE) + rng.normal(0, err, n)
    keep = np.ones(n, bool)
    keep[rng.choice(n, drop, replace=False)] = False
    found = np.concatenate([found[keep], rng.uniform(0, N_PIX - 1, extra)])
    errs = np.full(found.size, err)
    return found, errs, ref


def test_fit_drift_recovers_known_shift_and_stretch(rng):
    found, errs, ref = synthetic_lines(rng, shift=3.7, stretch=2e-4)
    fit = fit_drift(found, errs, ref, np.zeros_like(ref), CENTRE)
    assert abs(fit.shift - 3.7) < 4 * fit.shift_err
    assert abs(fit.stretch - 2e-4) < 4 * fit.stretch_err
    assert fit.shift_err < 0.01


def test_fit_drift_pulls_have_unit_scatter(rng):
    # the quoted shift error must describe the real scatter of repeated measurements
    pulls = []
    for _ in range(200):
        found, errs, ref = synthetic_lines(rng, shift=-1.2, stretch=0.0, err=0.05, extra=0)
        fit = fit_drift(found, errs, ref, np.zeros_like(ref), CENTRE)
        pulls.append((fit.shift + 1.2) / fit.shift_err)
    assert 0.8 < np.std(pulls) < 1.25


def test_fit_drift_matches_one_to_one_despite_large_shift(rng):
    found, errs, ref = synthetic_lines(rng, shift=-18.0, stretch=0.0, extra=10, drop=6)
    fit = fit_drift(found, errs, ref, np.zeros_like(ref), CENTRE, search_px=25.0)
    assert np.unique(fit.found_index).size == fit.found_index.size
    assert np.unique(fit.ref_index).size == fit.ref_index.size
    assert fit.ref_index.size >= 40 - 6
    assert abs(fit.shift + 18.0) < 0.01


def test_fit_drift_rejects_an_outlier(rng):
    found, errs, ref = synthetic_lines(rng, shift=0.5, stretch=0.0, extra=0, drop=0)
    found[10] += 1.0  # a line pulled by an unseen blend
    fit = fit_drift(found, errs, ref, np.zeros_like(ref), CENTRE)
    assert not fit.used[list(fit.found_index).index(10)]
    assert abs(fit.shift - 0.5) < 0.01


def test_fit_drift_without_lines_is_nan():
    fit = fit_drift(np.zeros(0), np.zeros(0), np.array([10.0, 20.0]), np.zeros(2), CENTRE)
    assert np.isnan(fit.shift) and fit.n_used == 0


def test_fit_drift_excluded_lines_count_as_matched_but_not_fitted(rng):
    found, errs, ref = synthetic_lines(rng, shift=0.2, stretch=0.0, extra=0, drop=0)
    mask = np.ones(found.size, bool)
    mask[:5] = False
    found[:5] += 0.5  # saturated lines: centroids off, must not pull the fit
    fit = fit_drift(found, errs, ref, np.zeros_like(ref), CENTRE, fit_mask=mask)
    assert fit.ref_index.size == found.size
    assert fit.n_used == found.size - 5
    assert abs(fit.shift - 0.2) < 0.01


# ---- status rules --------------------------------------------------------------------------


def measured_row(**kw):
    row = check._blank_row("x")
    row.update(shift_px=0.0, shift_err_px=0.01, stretch=0.0, fwhm_px=2.5, fwhm_change_pct=0.0,
               n_lines=20, n_expected=20, saturated_pixels=0, snr_median=200.0, missing="")
    row.update(kw)
    return row


def test_judge_passes_a_clean_exposure():
    assert judge(measured_row(), CheckLimits(), CENTRE) == ("pass", [])


def test_judge_fails_a_large_shift_and_says_why():
    status, reasons = judge(measured_row(shift_px=1.3), CheckLimits(max_shift_px=1.0), CENTRE)
    assert status == "fail"
    assert any("shift +1.300" in r and "limit of 1 px" in r for r in reasons)


def test_judge_warns_above_half_the_limit():
    status, reasons = judge(measured_row(shift_px=-0.6), CheckLimits(max_shift_px=1.0), CENTRE)
    assert status == "warn" and "shift -0.600" in reasons[0]


def test_judge_lists_every_reason():
    row = measured_row(shift_px=2.0, fwhm_change_pct=30.0, saturated_pixels=4, n_lines=15,
                       missing="1.000,2.000,3.000,4.000,5.000", snr_median=5.0)
    status, reasons = judge(row, CheckLimits(), CENTRE)
    text = " | ".join(reasons)
    assert status == "fail"
    for word in ("shift", "FWHM", "saturated", "missing", "SNR"):
        assert word in text


def test_judge_fails_too_few_lines():
    status, reasons = judge(measured_row(n_lines=3, n_expected=20), CheckLimits(min_lines=5),
                            CENTRE)
    assert status == "fail" and "only 3 of 20" in reasons[0]


def test_judge_fails_a_stretch_that_moves_the_ends_too_far():
    status, reasons = judge(measured_row(stretch=1e-3), CheckLimits(max_shift_px=1.0), CENTRE)
    assert status == "fail" and "stretch" in reasons[0]


# ---- files ---------------------------------------------------------------------------------


def test_collect_exposures_orders_naturally_and_skips_outdir(tmp_path):
    for name in ("exp10.txt", "exp2.txt", "exp1.fits", "notes.md"):
        (tmp_path / name).write_text("x")
    out = tmp_path / "out"
    out.mkdir()
    (out / "summary.ecsv").write_text("x")
    files = collect_exposures([tmp_path], exclude=out)
    assert [f.name for f in files] == ["exp1.fits", "exp2.txt", "exp10.txt"]


def test_collect_exposures_with_pattern_and_duplicates(tmp_path):
    for name in ("a.fits", "b.txt"):
        (tmp_path / name).write_text("x")
    files = collect_exposures([tmp_path / "b.txt", tmp_path], pattern="*.txt")
    assert [f.name for f in files] == ["b.txt"]


def test_collect_exposures_raises_when_nothing_found(tmp_path):
    with pytest.raises(RitzlineError, match="no exposure files"):
        collect_exposures([tmp_path])


# ---- runner: order, errors, journal, resume -------------------------------------------------


def test_run_batch_keeps_input_order_with_two_workers(tmp_path):
    paths = write_numbers(tmp_path / "in", 60, bad={7})
    result = run_batch(paths, NumberTask(), outdir=tmp_path / "out", workers=2)
    assert [r["file"] for r in result.rows] == [str(p) for p in paths]
    assert [r["index"] for r in result.rows] == list(range(60))
    assert result.rows[7]["status"] == "error" and "exp7.json" in result.rows[7]["reasons"]
    assert [r["shift_px"] for r in result.rows if r["status"] == "pass"] == [
        float(i) for i in range(60) if i != 7
    ]


def test_run_batch_writes_summary_readable_by_astropy(tmp_path):
    from astropy.table import Table

    paths = write_numbers(tmp_path / "in", 10, bad={3})
    run_batch(paths, NumberTask(), outdir=tmp_path / "out", workers=1, meta={"k": "v"})
    table = Table.read(tmp_path / "out" / "summary.ecsv")
    assert list(table["index"]) == list(range(10))
    assert table["shift_px"].unit == "pix"
    assert table.meta["k"] == "v"
    assert table["n_lines"].mask[3] and not table["n_lines"].mask[4]


def test_resume_skips_finished_exposures(tmp_path):
    paths = write_numbers(tmp_path / "in", 12)
    out = tmp_path / "out"
    run_batch(paths[:5], NumberTask(), outdir=out, workers=1)
    result = run_batch(paths, NumberTask(), outdir=out, workers=1, resume=True)
    assert result.n_skipped == 5 and result.n_run == 7
    assert [r["file"] for r in result.rows] == [str(p) for p in paths]


def test_without_resume_a_new_run_starts_over(tmp_path):
    paths = write_numbers(tmp_path / "in", 6)
    out = tmp_path / "out"
    run_batch(paths, NumberTask(), outdir=out, workers=1)
    result = run_batch(paths[:2], NumberTask(), outdir=out, workers=1)
    assert result.n_skipped == 0 and len(result.rows) == 2
    assert len(read_journal(out / "journal.jsonl")[1]) == 2


def test_resume_refuses_a_journal_made_with_other_settings(tmp_path):
    paths = write_numbers(tmp_path / "in", 3)
    out = tmp_path / "out"
    run_batch(paths, NumberTask(), outdir=out, workers=1, fingerprint={"limit": 1})
    with pytest.raises(RitzlineError, match="without --resume"):
        run_batch(paths, NumberTask(), outdir=out, workers=1, fingerprint={"limit": 2},
                  resume=True)


def test_a_dying_worker_stops_the_run_incomplete_and_keeps_the_journal(tmp_path):
    paths = write_numbers(tmp_path / "in", 40)
    for p in paths[5:]:
        p.write_text(json.dumps({"value": "die"}))
    out = tmp_path / "out"
    result = run_batch(paths, NumberTask(delay=0.01), outdir=out, workers=2, chunksize=2)
    assert not result.complete and "worker process died" in result.stopped
    assert "--resume" in result.stopped
    done = len(read_journal(out / "journal.jsonl")[1])
    assert 1 <= done < 40 and len(result.rows) == done


# ---- one owner per output folder -----------------------------------------------------------


def test_a_second_run_into_a_busy_output_folder_is_refused(tmp_path):
    out = tmp_path / "out"
    paths = write_numbers(tmp_path / "in", 3)
    with check.OutputLock(out):
        with pytest.raises(RitzlineError, match=r"in use by another check run \(pid \d+ on host"):
            run_batch(paths, NumberTask(), outdir=out, workers=1)
    # the owner's journal was never touched by the refused run
    assert not (out / "journal.jsonl").exists()
    assert run_batch(paths, NumberTask(), outdir=out, workers=1).complete
    assert not (out / check.LOCK_NAME).exists()


def test_the_lock_file_names_pid_host_and_start_time(tmp_path):
    import socket

    with check.OutputLock(tmp_path) as lock:
        info = json.loads(lock.path.read_text())
    assert info["pid"] == os.getpid() and info["host"] == socket.gethostname()
    assert info["started"][:4].isdigit()


def test_a_busy_folder_is_refused_across_processes(tmp_path):
    holder = subprocess.Popen(
        [sys.executable, "-c", "import sys, time; from ritzline.check import OutputLock; "
         f"l = OutputLock({str(tmp_path)!r}).acquire(); print('held', flush=True); "
         "time.sleep(60)"], stdout=subprocess.PIPE, text=True)  # fmt: skip
    try:
        assert holder.stdout.readline().strip() == "held"
        with pytest.raises(RitzlineError, match=f"pid {holder.pid} "):
            check.OutputLock(tmp_path).acquire()
    finally:
        holder.kill()
        holder.wait()
    # its process is gone: the lock is stale and taken over with a warning
    with pytest.warns(check.OutputLockWarning, match=f"stale lock.*pid {holder.pid}"):
        check.OutputLock(tmp_path).acquire().release()


def test_a_stale_lock_from_a_dead_process_is_taken_over_with_a_warning(tmp_path):
    import socket

    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()  # a pid that no longer runs
    (tmp_path / check.LOCK_NAME).write_text(json.dumps(
        {"pid": dead.pid, "host": socket.gethostname(), "started": "2026-01-01T00:00:00"}))
    paths = write_numbers(tmp_path / "in", 2)
    with pytest.warns(check.OutputLockWarning, match="no longer running"):
        result = run_batch(paths, NumberTask(), outdir=tmp_path, workers=1)
    assert result.complete


def test_a_lock_from_another_host_is_refused(tmp_path):
    (tmp_path / check.LOCK_NAME).write_text(json.dumps(
        {"pid": 1, "host": "some-other-host.invalid", "started": "2026-01-01T00:00:00"}))
    with pytest.raises(RitzlineError, match="another host"):
        check.OutputLock(tmp_path).acquire()


ORPHAN_SCRIPT = textwrap.dedent(
    """
    import sys
    from pathlib import Path
    sys.path.insert(0, {tests!r})
    from test_check import NumberTask
    from ritzline.check import run_batch
    paths = sorted(Path({indir!r}).glob("*.json"), key=lambda p: int(p.stem[3:]))
    run_batch(paths, NumberTask(delay=0.2), outdir={outdir!r}, workers=3, chunksize=1)
    """
)


def _children(pid):
    try:
        return [int(k) for k in Path(f"/proc/{pid}/task/{pid}/children").read_text().split()]
    except OSError:
        return []


def _alive(pid):
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return False
    return state != "Z"


@pytest.mark.skipif(not Path("/proc/self/task").exists(), reason="needs Linux /proc")
def test_workers_die_with_their_parent_after_sigkill(tmp_path):
    write_numbers(tmp_path / "in", 200)
    out = tmp_path / "out"
    script = ORPHAN_SCRIPT.format(tests=str(Path(__file__).parent), indir=str(tmp_path / "in"),
                                  outdir=str(out))
    proc = subprocess.Popen([sys.executable, "-c", script], start_new_session=True)
    deadline = time.monotonic() + 30
    workers = []
    while time.monotonic() < deadline and len(workers) < 2:
        workers = _children(proc.pid)
        time.sleep(0.05)
    assert len(workers) >= 2, "the pool did not start"
    journal = out / "journal.jsonl"
    while time.monotonic() < deadline and not (journal.exists() and
                                               journal.read_text().count("\n") > 3):
        time.sleep(0.05)
    os.kill(proc.pid, signal.SIGKILL)  # the parent only, not its process group
    proc.wait(timeout=10)
    deadline = time.monotonic() + 5
    while time.monotonic() < deadline and any(_alive(w) for w in workers):
        time.sleep(0.05)
    try:
        assert not [w for w in workers if _alive(w)], "a worker outlived its parent"
    finally:
        for w in workers:
            with contextlib.suppress(OSError):
                os.kill(w, signal.SIGKILL)
    # and the folder's lock went with them: a new run takes it over
    with pytest.warns(check.OutputLockWarning):
        result = run_batch(sorted((tmp_path / "in").glob("*.json")), NumberTask(),
                           outdir=out, workers=1, resume=True)
    assert result.complete


def test_read_journal_ignores_a_torn_last_line(tmp_path):
    path = tmp_path / "journal.jsonl"
    path.write_text(
        '{"ritzline_journal": 1, "config": {}}\n{"key": "a", "status": "pass"}\n{"key": "b", "st'
    )
    config, rows = read_journal(path)
    assert config == {} and list(rows) == ["a"]


def test_run_batch_reports_progress(tmp_path):
    paths = write_numbers(tmp_path / "in", 5)
    seen = []
    run_batch(paths, NumberTask(), workers=1, progress=lambda d, t: seen.append((d, t)))
    assert seen[-1] == (5, 5)


KILL_SCRIPT = textwrap.dedent(
    """
    import sys, time, json
    from pathlib import Path
    sys.path.insert(0, {tests!r})
    from test_check import NumberTask
    from ritzline.check import run_batch
    paths = sorted(Path({indir!r}).glob("*.json"), key=lambda p: int(p.stem[3:]))
    r = run_batch(paths, NumberTask(delay={delay}), outdir={outdir!r}, workers=2,
                  resume=True, summary_interval=0.05)
    print(json.dumps({{"skipped": r.n_skipped, "run": r.n_run}}))
    """
)


@pytest.mark.parametrize("sig", [signal.SIGKILL, signal.SIGINT])
def test_killed_run_resumes_without_missing_or_duplicated_exposures(tmp_path, sig):
    from astropy.table import Table

    n = 80
    paths = write_numbers(tmp_path / "in", n, bad={13})
    out = tmp_path / "out"
    script = KILL_SCRIPT.format(tests=str(Path(__file__).parent), indir=str(tmp_path / "in"),
                                outdir=str(out), delay=0.05)
    proc = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE,
                            start_new_session=True)
    journal = out / "journal.jsonl"
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        if journal.exists() and len(journal.read_text().splitlines()) > 10:
            break
        time.sleep(0.02)
    os.killpg(proc.pid, sig)  # the whole run: parent and its workers
    proc.wait(timeout=30)
    first = len(read_journal(journal)[1])
    assert 0 < first < n, "the run was not interrupted part way"
    if sig == signal.SIGINT:  # Ctrl-C: the summary is written on the way out
        assert len(Table.read(out / "summary.ecsv")) == first
    elif (out / "summary.ecsv").exists():  # a periodic rebuild: complete, never torn
        assert len(Table.read(out / "summary.ecsv")) <= first
    assert not list(out.glob(".*.tmp")) or sig == signal.SIGKILL

    done = subprocess.run([sys.executable, "-c", script], capture_output=True, check=True,
                          timeout=60)
    counts = json.loads(done.stdout.decode().strip().splitlines()[-1])
    assert counts["skipped"] >= first - 2 and counts["skipped"] + counts["run"] == n
    table = Table.read(out / "summary.ecsv")
    assert not list(out.glob(".*.tmp"))
    assert list(table["file"]) == [str(p) for p in paths]
    assert table["status"][13] == "error"
    assert list(table["shift_px"][table["status"] == "pass"]) == [
        float(i) for i in range(n) if i != 13
    ]


# ---- Dask backend --------------------------------------------------------------------------


@pytest.mark.parametrize("scheduler", ["local-threads", "local"])
def test_dask_local_cluster_gives_the_same_rows(tmp_path, scheduler):
    pytest.importorskip("distributed")
    paths = write_numbers(tmp_path / "in", 30, bad={4})
    pool = run_batch(paths, NumberTask(), workers=2)
    dask = run_batch(paths, NumberTask(), workers=2, dask_scheduler=scheduler,
                     outdir=tmp_path / "out")
    assert json.dumps(dask.rows) == json.dumps(pool.rows)


# ---- summary -------------------------------------------------------------------------------


def test_summary_table_of_no_rows_has_every_column():
    table = summary_table([])
    assert table.colnames == [c[0] for c in check.SUMMARY_COLUMNS]


# ---- real exposures: synthetic sequences with known drift ----------------------------------


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    """A reference solution and a short time-stamped sequence with known shifts, plus bad
    files of several kinds."""
    rng = np.random.default_rng(20261201)
    inst, lines = cs.bench_instrument(), cs.bench_lines()
    solution = cs.reference_solution(inst, lines, rng)
    folder = tmp_path_factory.mktemp("exposures")
    shifts = np.array([0.0, 0.12, -0.35, 0.61, 1.4, -2.5, 0.05, 0.3])
    stretches = np.array([0.0, 0.0, 1e-5, -2e-5, 0.0, 0.0, 0.0, 0.0])
    fwhms = np.full(shifts.size, inst.fwhm_px)
    fwhms[6] = inst.fwhm_px * 1.3  # defocused: must fail the FWHM limit
    paths = cs.write_sequence(folder, inst, lines, rng, shifts, stretches, fwhms)
    bad = {
        "empty": folder / "lamp_90000.txt",
        "garbage": folder / "lamp_90001.txt",
        "short": folder / "lamp_90002.txt",
    }
    bad["empty"].write_text("")
    bad["garbage"].write_bytes(bytes(range(256)) * 20)
    bad["short"].write_text("counts\n1\n2\n3\n")
    sol_path = solution.save(folder / "reference.json")
    return {"solution": solution, "solution_path": sol_path, "folder": folder, "paths": paths,
            "shifts": shifts, "stretches": stretches, "bad": bad, "inst": inst, "lines": lines}


def test_check_exposures_recovers_known_shifts(bench):
    table = check.check_exposures(bench["paths"], bench["solution"], workers=1)
    got = np.asarray(table["shift_px"], float)
    err = np.asarray(table["shift_err_px"], float)
    rms = np.sqrt(np.mean((got - bench["shifts"]) ** 2))
    assert rms < 0.02  # issue target: <= 0.02 px RMS at line SNR >= 100
    assert np.all(np.abs(got - bench["shifts"]) < 5 * err + 0.01)
    in_focus = np.arange(len(table)) != 6  # the defocused exposure has fainter peaks
    assert np.all(np.asarray(table["snr_median"])[in_focus] > 100)


def test_check_exposures_recovers_known_stretch(bench):
    table = check.check_exposures(bench["paths"][2:4], bench["solution"], workers=1)
    got = np.asarray(table["stretch"], float)
    err = np.asarray(table["stretch_err"], float)
    assert np.all(np.abs(got - bench["stretches"][2:4]) < 5 * err)


def test_check_exposures_shift_nm_follows_the_dispersion(bench):
    table = check.check_exposures(bench["paths"][3:4], bench["solution"], workers=1)
    d = float(bench["solution"].dispersion((3648 - 1) / 2))
    assert table["shift_nm"][0] == pytest.approx(table["shift_px"][0] * d, rel=1e-9)


def test_check_exposures_statuses_follow_the_limits(bench):
    table = check.check_exposures(bench["paths"], bench["solution"], workers=1,
                                  limits=CheckLimits(max_shift_px=1.0))
    # shifts 0.0, 0.12, -0.35, 0.61 (warn), 1.4 (fail), -2.5 (fail), defocused (fail), 0.3
    assert list(table["status"]) == ["pass", "pass", "pass", "warn", "fail", "fail", "fail",
                                     "pass"]
    assert "FWHM" in table["reasons"][6] and "limit" in table["reasons"][6]
    assert table["fwhm_change_pct"][6] == pytest.approx(30.0, abs=3.0)


def test_resolving_power_is_wavelength_over_fwhm_in_nm(bench):
    table = check.check_exposures(bench["paths"][:1], bench["solution"], workers=1)
    sol = bench["solution"]
    centre = (sol.n_pixels - 1) / 2
    expected = sol.wavelength(centre) / (table["fwhm_px"][0] * abs(sol.dispersion(centre)))
    assert table["resolving_power"][0] == pytest.approx(expected, rel=0.05)


def test_bad_files_are_error_rows_with_the_readers_reason(bench):
    paths = [bench["paths"][0], *bench["bad"].values()]
    table = check.check_exposures(paths, bench["solution"], workers=2)
    assert list(table["status"]) == ["pass", "error", "error", "error"]
    assert "empty" in table["reasons"][1]
    for i, p in enumerate(bench["bad"].values(), start=1):
        assert str(p) in table["reasons"][i]


def test_an_exposure_from_another_detector_fails(bench, tmp_path):
    path = cs.write_text_exposure(tmp_path / "other.txt", np.full(2048, 100.0))
    table = check.check_exposures([path], bench["solution"], workers=1)
    assert table["status"][0] == "fail" and "2048 pixels" in table["reasons"][0]


def test_missing_lines_are_listed(bench, tmp_path):
    lines = {k: v[5:] for k, v in bench["lines"].items()}  # the five bluest lines gone
    counts, _ = cs.clean_exposure(bench["inst"], lines, np.random.default_rng(3))
    path = cs.write_text_exposure(tmp_path / "fewer.txt", counts)
    table = check.check_exposures([path], bench["solution"], workers=1,
                                  limits=CheckLimits(max_missing_fraction=0.1))
    assert table["n_expected"][0] - table["n_lines"][0] == 5
    listed = [float(w) for w in table["missing"][0].split(",")]
    wl = np.sort(bench["lines"]["wavelength"])
    assert np.allclose(np.sort(listed), np.sort(bench["lines"]["wavelength"][:5]), atol=1e-3)
    assert wl.size == 36
    assert table["status"][0] == "warn" and "5 of 36 expected lines missing" in table["reasons"][0]


def test_saturated_pixels_are_counted_and_warned(bench, tmp_path):
    counts, _ = cs.clean_exposure(bench["inst"], bench["lines"], np.random.default_rng(4),
                                  saturate=(0.1, 0.1))
    path = cs.write_text_exposure(tmp_path / "sat.txt", counts)
    table = check.check_exposures([path], bench["solution"], workers=1)
    n_sat = int(np.count_nonzero(counts >= 65535))
    assert n_sat > 0 and table["saturated_pixels"][0] == n_sat
    assert "saturated pixel" in table["reasons"][0]


def test_outputs_are_written(bench, tmp_path):
    from astropy.table import Table

    out = tmp_path / "out"
    check.check_exposures([bench["folder"]], bench["solution_path"], outdir=out, workers=2)
    names = {p.name for p in out.iterdir()}
    assert {"summary.ecsv", "summary.json", "report.html", "drift.png", "fwhm.png",
            "status.png", "journal.jsonl"} <= names
    assert not [n for n in names if n.endswith(".tmp")]
    info = json.loads((out / "summary.json").read_text())
    table = Table.read(out / "summary.ecsv")
    assert info["totals"]["exposures"] == len(table) == 11
    assert info["totals"]["error"] == 3
    assert info["thresholds"]["max_shift_px"] == 1.0
    assert table["timestamp"][0] == "2026-03-14T08:00:00"


# ---- CLI -----------------------------------------------------------------------------------


def run_cli(*args):
    from click.testing import CliRunner

    from ritzline.cli import main

    return CliRunner().invoke(main, [str(a) for a in args])


def test_cli_exit_0_when_all_pass(bench, tmp_path):
    paths = [bench["paths"][i] for i in (0, 1, 2)]
    r = run_cli("check", *paths, "--solution", bench["solution_path"], "-o", tmp_path / "o")
    assert r.exit_code == 0, r.output
    assert "3 exposures: 3 pass" in r.output


def test_cli_warnings_exit_0_unless_strict(bench, tmp_path):
    path = bench["paths"][3]  # shift 0.61 px: a warning at --max-shift 1
    r = run_cli("check", path, "--solution", bench["solution_path"], "-o", tmp_path / "o")
    assert r.exit_code == 0, r.output
    r = run_cli("check", path, "--solution", bench["solution_path"], "-o", tmp_path / "o",
                "--strict")
    assert r.exit_code == 1


def test_cli_exit_1_on_a_failed_exposure(bench, tmp_path):
    r = run_cli("check", bench["paths"][4], "--solution", bench["solution_path"], "-o",
                tmp_path / "o", "--max-shift", "0.5")
    assert r.exit_code == 1 and "fail" in r.output


def test_cli_exit_1_on_a_bad_file(bench, tmp_path):
    r = run_cli("check", bench["bad"]["garbage"], "--solution", bench["solution_path"], "-o",
                tmp_path / "o")
    assert r.exit_code == 1 and "error" in r.output


def test_cli_exit_2_on_a_bad_solution_file(bench, tmp_path):
    bad = tmp_path / "bad.json"
    bad.write_text("{not json")
    r = run_cli("check", bench["paths"][0], "--solution", bad, "-o", tmp_path / "o")
    assert r.exit_code == 2 and r.output.startswith("error:") and "bad.json" in r.output


def test_cli_exit_2_when_no_files_are_found(bench, tmp_path):
    r = run_cli("check", tmp_path, "--solution", bench["solution_path"], "-o", tmp_path / "o")
    assert r.exit_code == 2 and "no exposure files" in r.output


def test_dask_backend_gives_the_same_summary_as_the_pool(bench):
    pytest.importorskip("distributed")
    pool = check.check_exposures(bench["paths"][:4], bench["solution"], workers=2)
    dask = check.check_exposures(bench["paths"][:4], bench["solution"], workers=2,
                                 dask_scheduler="local-threads")
    for name in ("status", "shift_px", "shift_err_px", "fwhm_px", "n_lines"):
        assert list(dask[name]) == list(pool[name])


def test_expected_lines_from_a_lamp_list(tmp_path):
    from ritzline import levels

    inst = cs.bench_instrument()
    table = levels.lamp_lines("Ne", medium="air")
    usable = np.asarray(table["usable"], bool)
    ne = {"wavelength": np.asarray(table["wavelength"], float)[usable],
          "intensity": np.asarray(table["intensity"], float)[usable]}
    rng = np.random.default_rng(2)
    solution = cs.reference_solution(inst, ne, rng)
    counts, _ = cs.clean_exposure(cs.drifted(inst, 0.4), ne, rng)
    path = cs.write_text_exposure(tmp_path / "ne.txt", counts)
    result = check.check_exposures([path], solution, lamp="Ne", workers=1)
    pix = inst.pixel(ne["wavelength"])
    on = int(np.count_nonzero((pix > 3) & (pix < inst.n_pixels - 4)))
    assert result["n_expected"][0] == on
    assert result["shift_px"][0] == pytest.approx(0.4, abs=0.02)
    assert result.meta["expected_lines"] == "lamp list"


def test_dark_frame_is_subtracted_before_line_finding(bench, tmp_path):
    from ritzline.synthetic import integrated_gaussians

    # a warm spot on the detector that looks like a line; the dark frame shows it too
    warm = 80.0 + integrated_gaussians(3648, [1500.3], [40000.0], 2.6)
    counts, _ = cs.clean_exposure(bench["inst"], bench["lines"], np.random.default_rng(6))
    exposure = cs.write_text_exposure(tmp_path / "exp.txt", counts + warm)
    dark = cs.write_text_exposure(tmp_path / "dark.txt", warm)
    plain = check.check_exposures([exposure], bench["solution"], workers=1)
    darked = check.check_exposures([exposure], bench["solution"], workers=1, dark=dark)
    assert plain["n_found"][0] == darked["n_found"][0] + 1
    assert darked["n_found"][0] == darked["n_lines"][0] == 36


def test_drift_is_robust_to_missing_extra_and_saturated_lines_and_spikes(bench, tmp_path):
    from ritzline.synthetic import lamp_exposure

    rng = np.random.default_rng(11)
    shifts = rng.uniform(-2.0, 2.0, 10)
    paths = []
    for i, s in enumerate(shifts):
        # defaults: 10-30 % of lines missing, up to 30 % unlisted extras, up to 10 %
        # saturated, up to 5 cosmic-ray hits
        counts, _ = lamp_exposure(cs.drifted(bench["inst"], s), bench["lines"], rng,
                                  intensity_scatter=0.2)
        paths.append(cs.write_text_exposure(tmp_path / f"messy{i}.txt", counts))
    table = check.check_exposures(paths, bench["solution"], workers=2)
    got = np.asarray(table["shift_px"], float)
    assert np.max(np.abs(got - shifts)) < 0.02


def test_figures_put_time_stamps_with_offsets_on_one_utc_axis(tmp_path):
    from ritzline.plots import _check_axis, plot_check_drift

    rows = []
    for i, stamp in enumerate(["2026-03-14T08:00:00+01:00", "2026-03-14T07:30:00Z", ""]):
        row = check._blank_row(f"f{i}")
        row.update(status="error" if not stamp else "pass", timestamp=stamp, shift_px=0.1,
                   shift_err_px=0.01)
        rows.append(row)
    x, label, is_time = _check_axis(summary_table(rows))
    assert is_time and label == "time stamp (UTC)"
    assert x[0] == np.datetime64("2026-03-14T07:00:00") and np.isnat(x[2])
    assert plot_check_drift(summary_table(rows), tmp_path / "d.png").stat().st_size > 1000


def test_figures_fall_back_to_input_order_when_a_stamp_is_missing():
    from ritzline.plots import _check_axis

    rows = [dict(check._blank_row("a"), status="pass", timestamp="2026-03-14T08:00:00"),
            dict(check._blank_row("b"), status="pass", timestamp="")]
    assert _check_axis(summary_table(rows))[1] == "exposure (input order)"


def test_fits_and_ecsv_exposures_are_checked_like_text(bench, tmp_path):
    from astropy.io import fits

    from ritzline.spectrum import read_spectrum, write_spectrum

    text = bench["paths"][3]
    spectrum = read_spectrum(text)
    counts = np.asarray(spectrum.flux.value, float)
    hdu = fits.PrimaryHDU(counts.astype(np.float32))
    hdu.header["DATE-OBS"] = "2026-03-14T09:15:00"
    hdu.header["SATURATE"] = 65535.0
    fits_path = tmp_path / "exp.fits"
    hdu.writeto(fits_path)
    ecsv_path = write_spectrum(spectrum, tmp_path / "exp.ecsv")
    table = check.check_exposures([text, fits_path, ecsv_path], bench["solution"], workers=1)
    assert list(table["status"]) == ["warn"] * 3
    assert np.ptp(np.asarray(table["shift_px"], float)) < 1e-3  # float32 rounding in FITS
    assert table["timestamp"][1] == "2026-03-14T09:15:00"


def test_an_unexpected_reader_exception_becomes_an_error_row(bench, monkeypatch):
    import ritzline.spectrum

    def broken(path, **kw):
        raise KeyError("HDU")

    monkeypatch.setattr(ritzline.spectrum, "read_spectrum", broken)
    checker = check.ExposureChecker(check.reference_from_solution(bench["solution"]))
    row = checker("odd.fits")
    assert row["status"] == "error"
    assert "odd.fits" in row["reasons"] and "KeyError" in row["reasons"]


def test_resume_redoes_an_exposure_whose_file_changed(tmp_path):
    paths = write_numbers(tmp_path / "in", 4)
    out = tmp_path / "out"
    run_batch(paths, NumberTask(), outdir=out, workers=1)
    paths[2].write_text(json.dumps({"value": 42}))
    os.utime(paths[2], ns=(1, 10**18))  # a different modification time, whatever the clock
    result = run_batch(paths, NumberTask(), outdir=out, workers=1, resume=True)
    assert result.n_skipped == 3 and result.n_run == 1
    assert [r["shift_px"] for r in result.rows] == [0.0, 1.0, 42.0, 3.0]


def test_cli_pattern_and_resume(bench, tmp_path):
    out = tmp_path / "o"
    args = ["--solution", bench["solution_path"], "-o", out]
    r = run_cli("check", bench["folder"], "--pattern", "lamp_0000[0-2].txt", *args)
    assert r.exit_code == 0 and "3 exposures: 3 pass" in r.output, r.output
    r = run_cli("check", bench["folder"], "--pattern", "lamp_0000[0-3].txt", "--resume", *args)
    assert "4 exposures:" in r.output and "(3 already checked in" in r.output


def test_a_reference_without_a_line_width_still_measures_the_drift(bench):
    from ritzline.calibration import Solution

    doc = bench["solution"].to_dict()
    doc["fwhm_pixel"] = None
    solution = Solution.from_dict(doc)
    table = check.check_exposures(bench["paths"][1:2], solution, workers=1)
    assert table["shift_px"][0] == pytest.approx(0.12, abs=0.02)
    assert np.isnan(table["fwhm_change_pct"][0]) and np.isfinite(table["fwhm_px"][0])


# ---- honest totals: masked samples, lamp off, files that are not spectra --------------------


def test_masked_samples_are_counted_and_warned_above_the_limit(bench, tmp_path):
    text = bench["paths"][0].read_text().splitlines()
    start = text.index("counts") + 1
    for k in range(1800, 1830):  # 30 samples that are not numbers, as in a corrupted copy
        text[start + k] = "nan" if k % 2 else "inf"
    path = tmp_path / "holes.txt"
    path.write_text("\n".join(text) + "\n")
    table = check.check_exposures([bench["paths"][0], path], bench["solution"], workers=1)
    assert list(table["masked_samples"]) == [0, 30]
    assert table["status"][1] == "warn" and "30 masked samples" in table["reasons"][1]
    lenient = check.check_exposures([path], bench["solution"], workers=1,
                                    limits=CheckLimits(max_masked_samples=30))
    assert lenient["status"][0] == "pass"


@pytest.mark.parametrize("kind", ["dark", "constant"])
def test_a_lamp_off_or_constant_frame_fails_with_no_lines_found(bench, tmp_path, kind):
    rng = np.random.default_rng(5)
    counts = (150.0 + rng.normal(0, 6.0, 3648)) if kind == "dark" else np.full(3648, 812.0)
    path = cs.write_text_exposure(tmp_path / f"{kind}.txt", counts)
    table = check.check_exposures([path], bench["solution"], workers=1)
    assert table["status"][0] == "fail"
    assert table["reasons"][0].startswith("no lines found (lamp off?)")
    assert table["n_found"][0] == 0 and table["n_lines"][0] == 0


def test_files_that_are_not_spectra_are_skipped_and_listed_not_errors(bench, tmp_path):
    folder = tmp_path / "data"
    folder.mkdir()
    good = folder / "lamp_00000.txt"
    good.write_bytes(bench["paths"][0].read_bytes())
    for name in ("README.txt", "notes.json", "overview.png", "run.log"):
        (folder / name).write_text("not a spectrum")
    found = check.find_exposures([folder, folder / "notes.json"])
    assert [p.name for p in found.files] == ["lamp_00000.txt"]
    assert sorted(p.name for p in found.skipped) == ["README.txt", "notes.json", "overview.png",
                                                     "run.log"]
    r = run_cli("check", folder, "--solution", bench["solution_path"], "-o", tmp_path / "o")
    assert r.exit_code == 0, r.output
    assert r.output.count("README.txt") == 1 and "skipped 4 files" in r.output
    assert "1 exposures: 1 pass, 0 warn, 0 fail, 0 error" in r.output
    info = json.loads((tmp_path / "o" / "summary.json").read_text())
    assert len(info["skipped_files"]) == 4 and info["totals"]["error"] == 0


def test_cli_lists_errors_then_fails_then_warnings(bench, tmp_path):
    paths = [bench["paths"][3], bench["paths"][4], bench["bad"]["garbage"], bench["paths"][0],
             bench["paths"][5], bench["bad"]["empty"]]  # warn, fail, error, pass, fail, error
    r = run_cli("check", *paths, "--solution", bench["solution_path"], "-o", tmp_path / "o")
    listed = [line.split()[0] for line in r.output.splitlines() if line.startswith("  ")]
    assert listed == ["error", "error", "fail", "fail", "warn"]
    assert r.exit_code == 1


def test_cli_an_incomplete_run_has_a_banner_and_exit_status_3(bench, tmp_path, monkeypatch):
    def dying_pool(task, items, workers, chunksize):
        items = list(items)
        index, key, path = items[0]
        yield index, key, task(path)
        raise check._WorkerDied("a worker process died (killed or out of memory); run the "
                                "same command again with --resume")

    monkeypatch.setattr(check, "_results_pool", dying_pool)
    out = tmp_path / "o"
    r = run_cli("check", *bench["paths"][:3], "--solution", bench["solution_path"], "-o", out)
    assert r.exit_code == 3, r.output
    assert "INCOMPLETE RUN: 2 of 3 exposures have no result" in r.output
    assert "worker process died" in r.output and "--resume" in r.output
    info = json.loads((out / "summary.json").read_text())
    assert info["complete"] is False and info["missing_exposures"] == 2
    assert "interrupted" in (out / "report.html").read_text(encoding="utf-8")
    monkeypatch.undo()
    r = run_cli("check", *bench["paths"][:3], "--solution", bench["solution_path"], "-o", out,
                "--resume")
    assert r.exit_code == 0 and "INCOMPLETE" not in r.output, r.output


def test_cli_refuses_an_output_folder_owned_by_another_run(bench, tmp_path):
    out = tmp_path / "o"
    with check.OutputLock(out):
        r = run_cli("check", bench["paths"][0], "--solution", bench["solution_path"], "-o", out)
    assert r.exit_code == 2 and r.output.startswith("error:") and "in use by another" in r.output


# ---- a stable series from an instrument with asymmetric lines --------------------------------


def skewed_counts(inst, lines, rng, shift):
    """A lamp exposure whose every line has a shoulder on its red side (a coma-like,
    asymmetric line shape, as compact spectrometers show): 70 % of the flux in a main
    Gaussian and 30 % in one 0.8 FWHM to its right, both pixel-integrated.  Today's finder
    fits each such line as two and flags both "blended"."""
    from ritzline.synthetic import integrated_gaussians, observe

    pix = cs.drifted(inst, shift).pixel(lines["wavelength"])
    flux = 1.5e5 * lines["intensity"]
    fw = inst.fwhm_px
    expected = inst.background + integrated_gaussians(
        inst.n_pixels, np.concatenate([pix, pix + 0.8 * fw]),
        np.concatenate([0.7 * flux, 0.3 * flux]), fw)
    return observe(expected, rng, gain=inst.gain, read_noise=inst.read_noise,
                   saturation=inst.saturation)


def test_a_stable_series_with_asymmetric_lines_passes(tmp_path):
    from ritzline.calibration import Solution
    from ritzline.peaks import find_lines

    rng = np.random.default_rng(77)
    inst, lines = cs.bench_instrument(), cs.bench_lines()
    # the reference: the same skewed lines measured by the finder on an undrifted frame
    counts = skewed_counts(inst, lines, rng, 0.0)
    found = find_lines(counts, fwhm_guess=inst.fwhm_px, saturation=cs.SATURATION)
    truth = inst.pixel(lines["wavelength"])
    fp = np.asarray(found["pixel"], float)
    j = np.abs(fp[None, :] - truth[:, None]).argmin(axis=1)
    ok = np.abs(fp[j] - truth) < 2.0
    doc = cs.reference_solution(inst, lines, rng).to_dict()
    doc["lines"] = [dict(doc["lines"][0], pixel=float(fp[k]),
                         pixel_err=float(found["pixel_err"][k]), wavelength_ref=float(w))
                    for k, w in zip(j[ok], lines["wavelength"][ok], strict=True)]  # fmt: skip
    doc["fwhm_pixel"] = float(np.median(np.asarray(found["fwhm_pixel"], float)[j[ok]]))
    solution = Solution.from_dict(doc, source="skewed reference")
    shifts = rng.normal(0.0, 0.07, 12)  # a stable spectrometer: 0.07 px RMS
    paths = [cs.write_text_exposure(tmp_path / f"s{i:02d}.txt",
                                    skewed_counts(inst, lines, rng, s))
             for i, s in enumerate(shifts)]  # fmt: skip
    table = check.check_exposures(paths, solution, workers=1)
    assert set(table["status"]) == {"pass"}, list(table["reasons"])
    got = np.asarray(table["shift_px"], float)
    assert np.max(np.abs(got - shifts)) < 0.03
    assert np.all(np.asarray(table["n_fit"]) >= 0.8 * ok.sum())


# ---- the fit at expected positions --------------------------------------------------------


def known_line_frames(rng, n_frames, shift, *, flux=2.0e5, fwhm=2.6, saturation=None):
    from ritzline.synthetic import integrated_gaussians, observe

    inst, lines = cs.bench_instrument(fwhm), cs.bench_lines()
    ref = inst.pixel(lines["wavelength"])
    true = ref + shift
    frames = [observe(150.0 + integrated_gaussians(inst.n_pixels, true, flux * lines["intensity"],
                                                   fwhm), rng, gain=1.5, read_noise=6.0,
                      saturation=saturation) for _ in range(n_frames)]  # fmt: skip
    return ref, true, frames


def test_known_line_fit_centroids_agree_with_truth_within_their_errors(rng):
    # truth: the positions put into the synthetic frames; the pulls (error / quoted error)
    # of an honest estimator have unit scatter (common practice)
    ref, true, frames = known_line_frames(rng, 20, shift=1.37)
    pulls = []
    for counts in frames:
        m = check.measure_known_lines(counts, np.ones(counts.size, bool), ref, 2.6)
        assert m.ref_index.size == ref.size  # every line found
        pulls.append((m.pixel - true[m.ref_index]) / m.pixel_err)
        assert np.all(np.abs(m.fwhm_pixel - 2.6) < 0.15)
        assert m.n_found == ref.size
    pulls = np.concatenate(pulls)
    assert abs(np.mean(pulls)) < 0.15 and 0.8 < np.std(pulls) < 1.25


def test_known_line_fit_measures_a_saturated_line_from_its_wings(rng):
    ref, true, frames = known_line_frames(rng, 3, shift=-0.6, flux=3.5e5, saturation=65535.0)
    for counts in frames:
        assert np.count_nonzero(counts >= 65535.0) > 10
        m = check.measure_known_lines(counts, np.ones(counts.size, bool), ref, 2.6,
                                      saturation=65535.0)
        sat = np.char.find(m.flags.astype(str), "saturated") >= 0
        assert sat.any() and (~sat).any()
        err = np.abs(m.pixel - true[m.ref_index])
        assert np.all(err[sat] < 5 * m.pixel_err[sat] + 0.02)
        # the flag marks exactly the lines with clipped samples at their centre
        clipped = counts[np.rint(true[m.ref_index]).astype(int)] >= 65535.0
        assert np.array_equal(sat, clipped)


def test_known_line_fit_reports_a_missing_line_as_not_found(rng):
    from ritzline.synthetic import integrated_gaussians, observe

    inst, lines = cs.bench_instrument(), cs.bench_lines()
    ref = inst.pixel(lines["wavelength"])
    keep = np.ones(ref.size, bool)
    keep[[3, 17]] = False
    counts = observe(150.0 + integrated_gaussians(inst.n_pixels, ref[keep],
                                                  2e5 * lines["intensity"][keep], 2.6), rng,
                     gain=1.5, read_noise=6.0)  # fmt: skip
    m = check.measure_known_lines(counts, np.ones(counts.size, bool), ref, 2.6)
    assert sorted(set(range(ref.size)) - set(m.ref_index.tolist())) == [3, 17]


def test_both_measurements_recover_the_known_shifts(bench):
    truth = bench["shifts"]
    for method in check.MEASURE_METHODS:
        table = check.check_exposures(bench["paths"], bench["solution"], workers=1,
                                      method=method)
        got = np.asarray(table["shift_px"], float)
        assert np.sqrt(np.mean((got - truth) ** 2)) < 0.02, method
        assert table.meta["line_measurement"].startswith(method)
