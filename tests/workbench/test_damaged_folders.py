"""Every command that reads a run folder checks it first and names the damage (issue 13).

Before, 43 of 88 commands on a folder with a corrupt, empty or truncated file ended in a
traceback, and 'report' on a folder whose estimates.csv was cut short exited 0 and showed
READY. Here each of rank, predict, check and report meets each damaged file in three ways:
one ``error:`` line naming the file and how to rebuild, exit 2, the folder unchanged.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from helpers import recorded_exit_code

from workbench import api
from workbench.cli.main import main

COMMANDS = {
    "rank": ["rank", "{f}", "--top", "2"],
    "predict": ["predict", "{f}", "--trials", "10"],
    "check": ["check", "{f}", "--replicates", "400"],
    "report": ["report", "{f}"],
}
FILES = ["posterior.nc", "run.json", "estimates.csv", "diagnostics.json", "checks.json",
         "ranks.csv"]
DAMAGE = ["corrupt", "empty", "truncated"]


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    out = tmp_path_factory.mktemp("made") / "run"
    rng = np.random.default_rng(5)
    trials = rng.integers(5, 60, 12)
    table = pd.DataFrame({"group": [f"g{i}" for i in range(12)],
                          "successes": rng.binomial(trials, 0.3), "trials": trials})
    api.fit(table, model="no-pooling", seed=5, out=out, replicates=400)
    return out


def _damage(path: Path, how: str) -> None:
    data = path.read_bytes()
    if how == "empty":
        path.write_bytes(b"")
    elif how == "truncated":
        path.write_bytes(data[: len(data) // 2])
    else:  # a run of bytes in the middle overwritten, the size unchanged
        mid = len(data) // 2
        path.write_bytes(data[:mid] + b"\x00\xff#garbage,," * 4 + data[mid + 48:])


def _snapshot(folder: Path) -> dict:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file()}


def _one_error_line(capsys, code):
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.startswith("error: ") and err.count("\n") == 1, err
    assert "Traceback" not in err
    return err


@pytest.mark.parametrize("how", DAMAGE)
@pytest.mark.parametrize("name", FILES)
@pytest.mark.parametrize("command", sorted(COMMANDS))
def test_damaged_file_is_one_error_line_exit_2(made, tmp_path, capsys, command, name, how):
    folder = tmp_path / "run"
    shutil.copytree(made, folder)
    _damage(folder / name, how)
    before = _snapshot(folder)
    code = main([a.format(f=folder) for a in COMMANDS[command]])
    err = _one_error_line(capsys, code)
    assert name in err and "rebuild" in err
    assert _snapshot(folder) == before
    assert [p.name for p in tmp_path.iterdir()] == ["run"]  # no staging left


@pytest.mark.parametrize("command", sorted(COMMANDS))
def test_missing_file_is_named(made, tmp_path, capsys, command):
    folder = tmp_path / "run"
    shutil.copytree(made, folder)
    (folder / "posterior.nc").unlink()
    err = _one_error_line(capsys, main([a.format(f=folder) for a in COMMANDS[command]]))
    assert "posterior.nc is missing" in err


@pytest.mark.parametrize("command", sorted(COMMANDS))
def test_cut_estimates_without_digests_is_caught_by_the_row_count(made, tmp_path, capsys,
                                                                  command):
    # an older folder (no digests in run.json) still has its row count checked
    folder = tmp_path / "run"
    shutil.copytree(made, folder)
    record = json.loads((folder / "run.json").read_text())
    record.pop("digests")
    (folder / "run.json").write_text(json.dumps(record))
    lines = (folder / "estimates.csv").read_text().splitlines()
    (folder / "estimates.csv").write_text("\n".join(lines[:6]) + "\n")
    err = _one_error_line(capsys, main([a.format(f=folder) for a in COMMANDS[command]]))
    assert "estimates.csv has 5 rows but run.json records 12 groups" in err
    assert "READY" not in err


def test_rebuild_names_the_command_that_made_the_folder(tmp_path, capsys):
    data = tmp_path / "d.csv"
    data.write_text("group,successes,trials\na,1,5\nb,2,6\nc,3,7\n")
    out = tmp_path / "run"
    assert main(["fit", str(data), "--model", "no-pooling", "--no-checks", "--seed", "1",
                 "--out", str(out)]) == 0
    capsys.readouterr()
    _damage(out / "estimates.csv", "truncated")
    err = _one_error_line(capsys, main(["rank", str(out)]))
    assert f"rebuild it with: workbench fit {data}" in err


def test_not_a_run_folder_and_foreign_files(made, tmp_path, capsys):
    plain = tmp_path / "plain"
    plain.mkdir()
    err = _one_error_line(capsys, main(["rank", str(plain)]))
    assert "is not a run folder" in err
    folder = tmp_path / "run"
    shutil.copytree(made, folder)
    (folder / "notes.txt").write_text("mine")
    err = _one_error_line(capsys, main(["report", str(folder)]))
    assert "'notes.txt', which workbench did not write" in err
    assert (folder / "notes.txt").read_text() == "mine"


@pytest.mark.slow
@pytest.mark.parametrize("how", DAMAGE)
@pytest.mark.parametrize("name", [f for f in FILES if f != "run.json"])
@pytest.mark.parametrize("command", sorted(COMMANDS))
def test_damage_without_digests_is_still_one_error_line(made, tmp_path, capsys, command, name,
                                                        how):
    # the parse checks behind the digests: an older folder, or digests removed by hand
    folder = tmp_path / "run"
    shutil.copytree(made, folder)
    record = json.loads((folder / "run.json").read_text())
    record.pop("digests")
    (folder / "run.json").write_text(json.dumps(record))
    _damage(folder / name, how)
    code = main([a.format(f=folder) for a in COMMANDS[command]])
    err = capsys.readouterr().err
    assert "Traceback" not in err
    if code != 2:  # a damage the parse checks cannot see must still give a whole answer
        assert code == recorded_exit_code(made), err  # as the undamaged folder's verdict says
        assert [p.name for p in tmp_path.iterdir()] == ["run"]
        return
    assert err.startswith("error: ") and err.count("\n") == 1, err
    assert name in err or "run folder" in err
