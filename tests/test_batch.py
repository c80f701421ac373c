"""Batches: many jobs (and variants of one job) in parallel on a local Dask cluster."""
from __future__ import annotations

from pathlib import Path

import pytest

from smootharea.batch import (BatchFileError, batch_exit_code, entry_job, load_batch,
                              shared_output_problems)
from smootharea.cli import EXIT_INPUT, EXIT_OK, main
from smootharea.history import default_store_url, open_store
from test_nightly import write_nc_job  # the small North Carolina job of the nightly checks


def write_batch(folder: Path, text: str) -> Path:
    path = folder / "batch.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_variants_get_their_name_and_own_output_folder(tmp_path):
    write_nc_job(tmp_path / "nc", write_data=False)
    batch = load_batch(write_batch(tmp_path, """
[[jobs]]
file = "nc/job.toml"

[[jobs]]
file = "nc/job.toml"
name = "nc_1979"
set = { "cases.count" = "SID79", "job.period" = "1979-1984", "sampling.draws" = 321 }
"""))
    plain, variant = (entry_job(e) for e in batch.entries)
    assert plain.output_dir == (tmp_path / "nc" / "output").resolve()
    assert variant.output_dir == (tmp_path / "nc" / "output" / "nc_1979").resolve()
    assert variant.description.name == "nc_1979" and variant.description.period == "1979-1984"
    assert variant.cases.count == "SID79" and variant.sampling.draws == 321
    assert plain.cases.count == "SID74" and plain.sampling.draws == 1000
    assert batch.workers == 2
    assert shared_output_problems(batch) == {}


def test_entries_sharing_an_output_folder_are_refused(tmp_path):
    write_nc_job(tmp_path / "nc", write_data=False)
    batch = load_batch(write_batch(tmp_path, """
[[jobs]]
file = "nc/job.toml"
name = "a"
[[jobs]]
file = "nc/job.toml"
name = "b"
set = { "output.dir" = "output/a" }
"""))
    problems = shared_output_problems(batch)
    assert list(problems) == ["b"] and "output folder of entry 'a'" in problems["b"]


def test_batch_file_problems_are_listed_together(tmp_path):
    with pytest.raises(BatchFileError) as caught:
        load_batch(write_batch(tmp_path, """
[batch]
workers = 0
[[jobs]]
name = "x"
[[jobs]]
file = "a.toml"
set = { "nonsense.key" = 1, "flat" = 2 }
colour = "red"
"""))
    message = str(caught.value)
    for expected in ("workers must be a whole number", "needs a 'file' key", "'nonsense.key'",
                     "'flat'", "unknown key 'colour'"):
        assert expected in message


def test_batch_exit_code_is_the_worst_entry():
    assert batch_exit_code([{"exit_code": 0}, {"exit_code": 0}]) == EXIT_OK
    assert batch_exit_code([{"exit_code": 0}, {"exit_code": 2}, {"exit_code": 1}]) == 2


@pytest.mark.slow
def test_batch_of_three_on_local_dask_cluster_with_one_broken(tmp_path, capsys):
    write_nc_job(tmp_path / "nc")
    batch_file = write_batch(tmp_path, """
[batch]
workers = 2

[[jobs]]
file = "nc/job.toml"
name = "nc_a"

[[jobs]]
file = "nc/job.toml"
name = "nc_b"
set = { "sampling.seed" = 7 }

[[jobs]]
file = "nc/job.toml"
name = "nc_broken"
set = { "cases.count" = "NO_SUCH_COLUMN" }
""")
    code = main(["batch", str(batch_file)])
    summary = capsys.readouterr().out
    assert code == EXIT_INPUT  # the worst entry: the broken job's input problem
    assert "batch: 2 of 3 job(s) succeeded" in summary
    lines = {line.split()[0]: line.split() for line in summary.splitlines()[2:]}
    assert lines["nc_a"][1:3] == ["0", "converged"] and lines["nc_b"][1:3] == ["0", "converged"]
    assert lines["nc_broken"][1:3] == ["1", "input_error"]
    assert "NO_SUCH_COLUMN" in summary
    output = tmp_path / "nc" / "output"
    for name in ("nc_a", "nc_b"):
        assert (output / name / "latest" / "areas.csv").is_file()
        store = open_store(default_store_url(output / name))
        assert list(store.list_runs(name)["status"]) == ["converged"]
        store.dispose()
    assert not (output / "nc_broken" / "latest").exists()
