"""Nightly runs: run folders, the ``latest`` link, the lock, exit codes, history and changes.

Two kinds of check:
- the run sequence with its steps replaced by stand-ins (invented three-area
  tables), to reach every failure path quickly;
- real runs on the North Carolina SIDS data (Cressie 1993, Statistics for
  Spatial Data, as bundled with libpysal): a run killed by SIGKILL while
  sampling, an input corrupted between runs, and one county's count raised.
  These use the Poisson-Gamma recipe with fixed hyperparameters and expected
  counts held fixed, so each county's posterior depends on its own count only:
  raising one count must change that county and no other.
"""
from __future__ import annotations

import errno
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import geopandas as gpd
import pandas as pd
import pytest

from smootharea import runner
from smootharea.cli import (EXIT_INPUT, EXIT_LOCKED, EXIT_NOT_CONVERGED, EXIT_OK, EXIT_OUTPUT, main)
from smootharea.history import default_store_url, open_store, read_run_record, sync_run_directories
from smootharea.job import load_job
from smootharea.locking import acquire_job_lock, read_lock_holder

ROOT = Path(__file__).resolve().parents[1]
NC_GPKG = ROOT / "example_regions" / "north_carolina" / "nc_counties.gpkg"
RAISED_COUNTY = "37001"  # Alamance: 13 SIDS deaths 1974-78 (Cressie 1993); raised to 45 below
RAISED_COUNT = 45


# --------------------------------------------------------------------------- a small NC job


def write_nc_data(folder: Path, raise_area: tuple[str, int] | None = None) -> Path:
    """The NC counties with expected counts fixed at births x statewide rate (EXP74)."""
    counties = gpd.read_file(NC_GPKG, layer="counties")
    counties["EXP74"] = counties["BIR74"] * counties["SID74"].sum() / counties["BIR74"].sum()
    if raise_area:
        counties.loc[counties["FIPS"] == raise_area[0], "SID74"] = raise_area[1]
    path = folder / "nc.gpkg"
    counties.to_file(path, layer="counties", driver="GPKG", engine="pyogrio")
    return path


def write_nc_job(folder: Path, name: str = "nc_nightly", recipe: str = "poisson_gamma",
                 draws: int = 1000, warmup: int = 500, store: str | None = None,
                 file_name: str = "job.toml", write_data: bool = True) -> Path:
    """A North Carolina job small enough for tests (2 chains)."""
    folder.mkdir(parents=True, exist_ok=True)
    if write_data:
        write_nc_data(folder)
    store_line = f'store = "{store}"\n' if store else ""
    text = f"""[job]
name = "{name}"
period = "1974-1978"
source = "Cressie (1993) via libpysal; expected counts fixed for the test"

[areas]
path = "nc.gpkg"
layer = "counties"
id = "FIPS"

[cases]
count = "SID74"

[expected]
column = "EXP74"

[model]
recipe = "{recipe}"

[sampling]
chains = 2
draws = {draws}
warmup = {warmup}
seed = 20261201

[report]
thresholds = [1.0]
suppress_below = 5

[output]
dir = "output"
{store_line}"""
    path = folder / file_name
    path.write_text(text, encoding="utf-8")
    return path


def latest_target(out_dir: Path) -> str:
    return os.readlink(out_dir / "latest")


# --------------------------------------------------------------------------- stand-in steps


class FakeVerdict:
    def __init__(self, converged: bool):
        self.converged = converged
        self.reasons = [] if converged else ["R-hat of sigma is 1.05 (above 1.01)"]

    def to_dict(self):
        return {"converged": self.converged, "reasons": self.reasons, "max_rhat": 1.0}


def fake_areas(p_first: float) -> pd.DataFrame:
    return pd.DataFrame({"area_id": ["a", "b", "c"], "observed": [12, 3, 9],
                         "expected": [10.0, 4.0, 9.0], "rr_median": [1.2, 0.8, 1.0],
                         "rank_median": [1.0, 3.0, 2.0], "rank_lower": [1, 2, 1],
                         "rank_upper": [2, 3, 3], "signal": ["higher", "unclear", "unclear"],
                         "p_above_1": [p_first, 0.4, 0.5]})


def use_stand_ins(monkeypatch, converged: bool = True, write_error: OSError | None = None,
                  input_error: Exception | None = None, p_first: float = 0.9) -> None:
    """Replace load, fit and write by quick stand-ins with the same contract."""
    def prepare(job):
        if input_error:
            raise input_error
        return SimpleNamespace(study=SimpleNamespace(input_hashes={"cases.csv": "0" * 64}))

    def fit(job, prepared, progress):
        return SimpleNamespace(verdict=FakeVerdict(converged), areas=fake_areas(p_first),
                               model_info={"recipe": {"name": "stand-in"}, "priors": ["none"]})

    def write(result, run_dir):
        if write_error:
            (run_dir / ".areas.csv.partial").write_text("area_id,obs")  # half a file, as a full disk leaves
            raise write_error
        table = result.areas.copy()
        table["suppressed"] = table["observed"] < 5
        table.loc[table["suppressed"], "observed"] = pd.NA
        table.to_csv(run_dir / "areas.csv", index=False)
        return {"areas.csv": run_dir / "areas.csv"}

    monkeypatch.setattr(runner, "prepare_inputs", prepare)
    monkeypatch.setattr(runner, "fit_model", fit)
    monkeypatch.setattr(runner, "write_run_outputs", write)
    monkeypatch.setitem(sys.modules, "smootharea.report", None)  # no report in these checks


@pytest.fixture
def quick_job(tmp_path):
    return load_job(write_nc_job(tmp_path / "job", name="stand_in_job", write_data=False))


def history_of(job) -> pd.DataFrame:
    store = open_store(default_store_url(job.output_dir))
    try:
        return store.list_runs(job.description.name)
    finally:
        store.dispose()


def test_converged_runs_move_latest_and_are_recorded(quick_job, monkeypatch):
    use_stand_ins(monkeypatch)
    first = runner.run_job(quick_job, echo=False)
    second = runner.run_job(quick_job, echo=False)
    assert (first.exit_code, second.exit_code) == (EXIT_OK, EXIT_OK)
    out = quick_job.output_dir
    assert latest_target(out) == f"runs/{second.run_id}"
    assert (out / "latest" / "areas.csv").is_file()
    record = read_run_record(second.run_dir)
    for key in ("job", "run_id", "started_at", "ended_at", "input_hashes", "recipe", "priors",
                "package_versions", "seed", "verdict"):
        assert record[key] not in (None, {}, []), key
    assert record["status"] == "converged" and record["areas_flagged"] == 1
    log_lines = (second.run_dir / "run.log").read_text().splitlines()
    assert "SUMMARY" in log_lines[-1] and "exit 0" in log_lines[-1]
    runs = history_of(quick_job)
    assert set(runs["run_id"]) == {first.run_id, second.run_id}
    # The stored per-area table is the published one: the small count (3) is blank.
    store = open_store(default_store_url(out))
    assert store.area_results(second.run_id).set_index("area_id").loc["b", "observed"] is pd.NA
    store.dispose()
    result, paths = second  # still unpacks like the old (result, paths) pair
    assert paths["areas.csv"].parent == second.run_dir


def test_not_converged_run_keeps_its_folder_but_not_latest(quick_job, monkeypatch):
    use_stand_ins(monkeypatch)
    good = runner.run_job(quick_job, echo=False)
    use_stand_ins(monkeypatch, converged=False)
    flagged = runner.run_job(quick_job, echo=False)
    assert flagged.exit_code == EXIT_NOT_CONVERGED
    assert (flagged.run_dir / "areas.csv").is_file()
    assert latest_target(quick_job.output_dir) == f"runs/{good.run_id}"
    runs = history_of(quick_job).set_index("run_id")
    assert runs.loc[flagged.run_id, "status"] == "not_converged"
    assert runs.loc[flagged.run_id, "verdict"].startswith("not converged: R-hat")


def test_full_disk_leaves_previous_results_untouched(quick_job, monkeypatch):
    use_stand_ins(monkeypatch)
    good = runner.run_job(quick_job, echo=False)
    before = (quick_job.output_dir / "latest" / "areas.csv").read_text()
    use_stand_ins(monkeypatch, write_error=OSError(errno.ENOSPC, "No space left on device"))
    failed = runner.run_job(quick_job, echo=False)
    assert failed.exit_code == EXIT_OUTPUT
    assert "No space left" in failed.message
    assert latest_target(quick_job.output_dir) == f"runs/{good.run_id}"
    assert (quick_job.output_dir / "latest" / "areas.csv").read_text() == before
    assert history_of(quick_job).set_index("run_id").loc[failed.run_id, "status"] == "output_failed"


def test_input_problem_exits_1_and_is_recorded(quick_job, monkeypatch):
    from smootharea.problems import InputError, Problem
    use_stand_ins(monkeypatch)
    good = runner.run_job(quick_job, echo=False)
    use_stand_ins(monkeypatch, input_error=InputError([Problem("cases.csv", "count is negative",
                                                               "cases", "a")]))
    bad = runner.run_job(quick_job, echo=False)
    assert bad.exit_code == EXIT_INPUT
    assert "count is negative" in (bad.run_dir / "run.log").read_text()
    assert latest_target(quick_job.output_dir) == f"runs/{good.run_id}"
    assert history_of(quick_job).set_index("run_id").loc[bad.run_id, "exit_code"] == EXIT_INPUT


def test_second_run_while_one_holds_the_lock_exits_4(quick_job, monkeypatch):
    use_stand_ins(monkeypatch)
    with acquire_job_lock(quick_job.output_dir, "someone-else"):
        outcome = runner.run_job(quick_job, echo=False)
    assert outcome.exit_code == EXIT_LOCKED
    assert not (quick_job.output_dir / "runs").exists()  # it did not even start a folder


def test_failing_report_is_a_warning_not_a_failed_run(quick_job, monkeypatch):
    use_stand_ins(monkeypatch)
    broken = SimpleNamespace(write_report=lambda run_dir: (_ for _ in ()).throw(RuntimeError("no fonts")))
    monkeypatch.setitem(sys.modules, "smootharea.report", broken)
    outcome = runner.run_job(quick_job, echo=False)
    assert outcome.exit_code == EXIT_OK
    assert "report could not be written (RuntimeError: no fonts)" in (outcome.run_dir / "run.log").read_text()


def test_unreachable_store_exits_3_and_sync_records_later(quick_job, monkeypatch):
    use_stand_ins(monkeypatch)
    outcome = runner.run_job(quick_job, echo=False,
                             store_url="postgresql+psycopg://nobody@127.0.0.1:1/history")
    assert outcome.exit_code == EXIT_OUTPUT and not outcome.recorded
    assert "--sync" in outcome.message
    assert latest_target(quick_job.output_dir) == f"runs/{outcome.run_id}"  # the results themselves are fine
    assert read_run_record(outcome.run_dir)["status"] == "converged"
    store = open_store(default_store_url(quick_job.output_dir))
    assert sync_run_directories(store, quick_job.output_dir, "stand_in_job") == [outcome.run_id]
    assert len(store.area_results(outcome.run_id)) == 3
    store.dispose()


# --------------------------------------------------------------------------- real runs


def run_cli(*args: str) -> int:
    return main([str(a) for a in args])


def start_cli_run(job_file: Path) -> subprocess.Popen:
    # The run is killed mid-sampling and cannot remove its disk trace: keep that in the test's
    # own temporary folder, not the machine's.
    scratch = job_file.parent / "tmp"
    scratch.mkdir(exist_ok=True)
    env = {**os.environ, "PYTHONPATH": f"{ROOT}{os.pathsep}{os.environ.get('PYTHONPATH', '')}",
           "TMPDIR": str(scratch)}
    return subprocess.Popen([sys.executable, "-m", "smootharea.cli", "run", str(job_file), "--quiet"],
                            cwd=ROOT, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)


def wait_for_log_line(out_dir: Path, known: set[str], text: str, process: subprocess.Popen,
                      timeout: float = 240) -> Path:
    """The new run folder, once its run.log contains ``text``."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        assert process.poll() is None, process.stderr.read().decode()
        for run_dir in (out_dir / "runs").glob("*"):
            log = run_dir / "run.log"
            if run_dir.name not in known and log.is_file() and text in log.read_text():
                return run_dir
        time.sleep(0.2)
    raise AssertionError(f"no run logged {text!r} within {timeout} s")


@pytest.fixture(scope="module")
def nightly(tmp_path_factory):
    """Five nights of one job; every observation the checks below need is kept."""
    folder = tmp_path_factory.mktemp("nightly")
    job_file = write_nc_job(folder)
    # The same job (same name, same output folder) with a long chain, to be killed mid-sampling.
    long_job = write_nc_job(folder, draws=200_000, file_name="job_long.toml", write_data=False)
    out = folder / "output"
    story = SimpleNamespace(folder=folder, job_file=job_file, out=out)

    story.first_code = run_cli("run", job_file, "--quiet")
    story.first_run = latest_target(out).split("/")[-1]
    story.first_areas = (out / "latest" / "areas.csv").read_bytes()

    known = {p.name for p in (out / "runs").iterdir()}
    process = start_cli_run(long_job)
    story.killed_dir = wait_for_log_line(out, known, "fitting recipe", process)
    time.sleep(10)  # compilation is cached by the first run; by now the long chain is sampling
    story.killed_holder = read_lock_holder(out)
    process.send_signal(signal.SIGKILL)
    process.wait(timeout=60)
    story.killed_returncode = process.returncode
    story.killed_pid = process.pid
    story.after_kill_latest = latest_target(out)
    story.after_kill_areas = (out / "latest" / "areas.csv").read_bytes()
    story.killed_log = (story.killed_dir / "run.log").read_text()

    story.third_code = run_cli("run", job_file, "--quiet")
    story.third_run = latest_target(out).split("/")[-1]
    story.third_log = (out / "latest" / "run.log").read_text()

    gpkg = folder / "nc.gpkg"
    good = gpkg.read_bytes()
    gpkg.write_bytes(good[:4096] + b"\x00garbage" * 64)  # a truncated, overwritten file
    known = {p.name for p in (out / "runs").iterdir()}
    story.corrupt_code = run_cli("run", job_file, "--quiet")
    story.corrupt_run = ({p.name for p in (out / "runs").iterdir()} - known).pop()
    story.after_corrupt_latest = latest_target(out)
    story.after_corrupt_areas = (out / "latest" / "areas.csv").read_bytes()
    gpkg.write_bytes(good)

    write_nc_data(folder, raise_area=(RAISED_COUNTY, RAISED_COUNT))
    story.raised_code = run_cli("run", job_file, "--quiet")
    story.raised_run = latest_target(out).split("/")[-1]
    story.changes_csv = folder / "changes.csv"
    story.changes_code = run_cli("changes", job_file, "--csv", story.changes_csv)
    store = open_store(default_store_url(out))
    story.history = store.list_runs("nc_nightly").set_index("run_id")
    store.dispose()
    return story


@pytest.mark.slow
def test_killed_run_leaves_latest_on_the_previous_run(nightly):
    assert nightly.first_code == EXIT_OK  # Poisson-Gamma, 2 x 1000 draws: converges
    assert nightly.killed_returncode == -signal.SIGKILL
    assert nightly.killed_holder["pid"] == nightly.killed_pid  # the killed run held the lock
    assert "fitting recipe" in nightly.killed_log and "sampler verdict" not in nightly.killed_log
    assert nightly.after_kill_latest == f"runs/{nightly.first_run}"
    assert nightly.after_kill_areas == nightly.first_areas  # still readable, byte for byte
    assert not (nightly.killed_dir / "areas.csv").exists()


@pytest.mark.slow
def test_lock_of_killed_run_is_recovered_and_next_run_succeeds(nightly):
    assert nightly.third_code == EXIT_OK
    assert "lock reclaimed" in nightly.third_log
    assert f"pid {nightly.killed_pid}" in nightly.third_log
    # The next run also recorded the killed one in the history, as interrupted.
    assert nightly.history.loc[nightly.killed_dir.name, "status"] == "interrupted"
    assert read_run_record(nightly.killed_dir)["status"] == "interrupted"


@pytest.mark.slow
def test_corrupt_input_exits_1_and_keeps_previous_results(nightly):
    assert nightly.corrupt_code == EXIT_INPUT
    assert nightly.after_corrupt_latest == f"runs/{nightly.third_run}"
    third_areas = (nightly.out / "runs" / nightly.third_run / "areas.csv").read_bytes()
    assert nightly.after_corrupt_areas == third_areas
    failed = nightly.history.loc[nightly.corrupt_run]
    assert failed["status"] == "input_error" and failed["exit_code"] == EXIT_INPUT
    good_hash = nightly.history.loc[nightly.third_run, "input_hashes"]
    assert failed["input_hashes"] != good_hash  # the record shows the input file changed


@pytest.mark.slow
def test_changes_reports_the_raised_county_only(nightly):
    assert nightly.raised_code == EXIT_OK and nightly.changes_code == EXIT_OK
    changes = pd.read_csv(nightly.changes_csv, dtype={"area_id": str})
    assert list(changes["area_id"]) == [RAISED_COUNTY]
    row = changes.iloc[0]
    assert row["p_above_1_after"] > row["p_above_1_before"] + 0.1
    assert row["observed_before"] == 13 and row["observed_after"] == RAISED_COUNT


@pytest.mark.slow
def test_history_command_lists_every_night(nightly, capsys):
    capsys.readouterr()
    assert run_cli("history", nightly.job_file) == EXIT_OK
    listing = capsys.readouterr().out
    for run_id in (nightly.first_run, nightly.killed_dir.name, nightly.third_run,
                   nightly.corrupt_run, nightly.raised_run):
        assert run_id in listing
    assert "interrupted" in listing and "input_error" in listing
