"""The audit commands on the command line: one-line errors, and the folder they update."""

from __future__ import annotations

import json

import pandas as pd
import pytest

from workbench import api
from workbench.cli.main import main
from workbench.io import runfolder


@pytest.fixture(scope="module")
def small_run(tmp_path_factory):
    table = pd.DataFrame({"group": [f"s{i}" for i in range(8)],
                          "successes": [1, 2, 0, 3, 2, 1, 4, 2],
                          "trials": [6, 8, 5, 9, 7, 6, 10, 8]})
    out = tmp_path_factory.mktemp("audit") / "small-run"
    api.fit(table, seed=2, checks=False, target=0.3, out=out)
    return out


def test_calibrate_with_a_folder_refuses_fit_only_options(small_run, capsys):
    assert main(["calibrate", str(small_run), "--model", "no-pooling"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("error: --model goes with a data file") and "\n" not in err


def test_calibrate_refuses_a_bad_simulation_count(small_run, capsys):
    assert main(["calibrate", str(small_run), "--simulations", "0"]) == 2
    assert "--simulations 0" in capsys.readouterr().err


def test_sensitivity_of_a_folder_that_is_not_one(tmp_path, capsys):
    assert main(["sensitivity", str(tmp_path)]) == 2
    assert "is not a run folder" in capsys.readouterr().err


@pytest.mark.slow  # seven exact fits: tens of seconds on two shared cores
def test_sensitivity_writes_its_files_and_records_the_verdict(small_run, capsys):
    assert main(["sensitivity", str(small_run), "--quiet"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("prior sensitivity: ")
    doc = json.loads(runfolder.path_of(small_run, "sensitivity_summary").read_text())
    record = json.loads(runfolder.path_of(small_run, "record").read_text())
    assert record["sensitivity"]["verdict"] == doc["verdict"]
    assert doc["verdict"] in out
    table = runfolder.read_table(runfolder.path_of(small_run, "sensitivity"))
    assert len(table) == 8 * len(doc["alternatives"])
    noted = any(str(n).startswith("prior sensitivity:") for n in record["notes"])
    assert noted == (doc["verdict"] == "sensitive")
