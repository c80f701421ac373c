"""`smootharea check` end to end on the North Carolina SIDS job and the demo job."""
import json
from pathlib import Path

import pytest

from smootharea.cli import main

ROOT = Path(__file__).resolve().parents[1]
NC_JOB = ROOT / "example_regions" / "north_carolina" / "job.toml"
DEMO_JOB = ROOT / "example_regions" / "tarvossia" / "job.toml"


def run_check_json(job, capsys):
    status = main(["check", str(job), "--json"])
    return status, json.loads(capsys.readouterr().out)


def test_check_north_carolina(capsys):
    # Cressie 1993 (Statistics for Spatial Data), data as bundled by libpysal:
    # 100 counties, 667 SIDS deaths and 329,962 births in 1974-78; one component, no islands.
    status, summary = run_check_json(NC_JOB, capsys)
    assert status == 0
    assert summary["areas"] == 100
    assert summary["observed_total"] == 667
    assert summary["islands"] == []
    assert summary["components"] == [100]
    assert len(summary["scaling_factors"]) == 1
    # Crude standardisation reproduces the observed total exactly (METHODS.md section 1).
    assert summary["expected_total"] == pytest.approx(667, abs=1e-6)
    assert summary["overdispersion"] > 1.0
    for key in ("links", "morans_i", "glm"):
        assert key in summary


def test_check_demo_has_islands_joined_by_ferry(capsys):
    status, summary = run_check_json(DEMO_JOB, capsys)
    assert status == 0
    assert 150 <= summary["areas"] <= 400
    # The ferry link file joins the island districts, so no island remains.
    assert summary["islands"] == []
    assert sum(summary["components"]) == summary["areas"]
    # Internal indirect standardisation: sum E = sum O (METHODS.md section 1).
    assert summary["expected_total"] == pytest.approx(summary["observed_total"], rel=1e-9)


def test_check_reports_every_problem_and_exits_1(tmp_path, capsys):
    (tmp_path / "job.toml").write_text(
        '[areas]\npath = "missing.gpkg"\nid = "id"\n[cases]\ncount = "c"\n'
        '[population]\ncount = "p"\n', encoding="utf-8")
    status = main(["check", str(tmp_path / "job.toml")])
    assert status == 1
    assert "missing.gpkg" in capsys.readouterr().err
