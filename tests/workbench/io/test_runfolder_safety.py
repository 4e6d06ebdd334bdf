"""Never lose a file: what may be replaced, staging clean-up, whole-folder swaps, safe CSVs.

Each case was a loss or a leak before (issue 13): a folder holding any file named run.json was
deleted whole; --out problems surfaced only after the fit; staging folders of killed runs
stayed; two writers finishing together raised 'Directory not empty'; group names starting a
spreadsheet formula were written raw into every CSV.
"""

from __future__ import annotations

import csv
import json
import os
import shutil
import threading
import time
from pathlib import Path

import pandas as pd
import pytest
from workbench.models import DataError

from workbench import api, pipeline
from workbench.io import atomic, runfolder

FORMULA_NAMES = ["=1+1", "+x", "-3", "@a", "\t=x", "\r=y", "'=x", "''+y", "ok", "'plain"]
ROOT = os.geteuid() == 0 if hasattr(os, "geteuid") else False


def _table(names=("a", "b", "c", "d")):
    n = len(names)
    return pd.DataFrame({"group": list(names), "successes": [i % 4 for i in range(n)],
                         "trials": [5 + i for i in range(n)]})


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    """One small run folder (no-pooling, exact: under a second), copied by each test."""
    out = tmp_path_factory.mktemp("made") / "run"
    api.fit(_table(), model="no-pooling", seed=3, out=out, checks=False)
    return out


@pytest.fixture
def run(made, tmp_path):
    out = tmp_path / "run"
    shutil.copytree(made, out)
    return out


def _snapshot(folder: Path) -> dict:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file()}


def _no_fit(monkeypatch):
    def refuse(*a, **k):
        raise AssertionError("the fit started before --out was checked")
    monkeypatch.setattr(pipeline, "fit_model", refuse)


def test_project_folder_with_its_own_run_json_is_never_replaced(tmp_path, monkeypatch):
    project = tmp_path / "project"
    project.mkdir()
    (project / "run.json").write_text('{"name": "my project", "workbench_run": 2}')
    (project / "notes.md").write_text("mine")
    before = _snapshot(project)
    _no_fit(monkeypatch)
    with pytest.raises(DataError, match="run.json that is not workbench's .*untouched"):
        api.fit(_table(), model="no-pooling", out=project)
    assert _snapshot(project) == before


@pytest.mark.parametrize("extra", ["notes.txt", ".git", "figures/mine.txt", "link"])
def test_run_folder_with_a_foreign_file_is_refused_and_kept(run, extra, monkeypatch):
    target = run / extra
    target.parent.mkdir(exist_ok=True)
    if extra == "link":
        target.symlink_to(run / "estimates.csv")
    else:
        target.write_text("mine")
    before = _snapshot(run)
    _no_fit(monkeypatch)
    with pytest.raises(DataError, match=f"holds files workbench did not write \\(.*{extra}"):
        api.fit(_table(), model="no-pooling", out=run)
    assert _snapshot(run) == before


def test_a_run_folder_of_this_tool_is_replaced_whole(run):
    api.fit(_table(("x", "y", "z")), model="no-pooling", seed=4, out=run, checks=False)
    assert runfolder.read_folder(run).estimates["group"].tolist() == ["x", "y", "z"]
    assert [p.name for p in run.parent.iterdir() if p.name.startswith(".")] == []


def test_schema_or_tool_not_ours_is_not_a_run_folder(run):
    record = json.loads((run / "run.json").read_text())
    for change in ({"tool": "other"}, {"workbench_run": 99}, {"workbench_run": "2"}):
        (run / "run.json").write_text(json.dumps({**record, **change}))
        assert not runfolder.is_run_folder(run)
        with pytest.raises(DataError, match="not workbench's"):
            runfolder.check_replaceable(run)


def test_out_dot_is_refused_before_fitting(run, monkeypatch):
    monkeypatch.chdir(run)
    _no_fit(monkeypatch)
    with pytest.raises(DataError, match="is the working folder"):
        api.fit(_table(), model="no-pooling", out=".")


def test_dangling_and_real_symlinks_are_refused_before_fitting(run, tmp_path, monkeypatch):
    _no_fit(monkeypatch)
    dangling = tmp_path / "dangling"
    dangling.symlink_to(tmp_path / "nowhere")
    with pytest.raises(DataError, match="dangling symbolic link"):
        api.fit(_table(), model="no-pooling", out=dangling)
    link = tmp_path / "linked"
    link.symlink_to(run)
    before = _snapshot(run)
    with pytest.raises(DataError, match="is a symbolic link"):
        api.fit(_table(), model="no-pooling", out=link)
    assert _snapshot(run) == before and link.is_symlink()


@pytest.mark.skipif(ROOT, reason="root may write anywhere")
def test_read_only_out_and_unwritable_parent_are_refused_before_fitting(run, tmp_path,
                                                                        monkeypatch):
    _no_fit(monkeypatch)
    before = _snapshot(run)
    run.chmod(0o555)
    try:
        with pytest.raises(DataError, match="is read-only"):
            api.fit(_table(), model="no-pooling", out=run)
    finally:
        run.chmod(0o755)
    assert _snapshot(run) == before
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o555)
    try:
        with pytest.raises(DataError, match="cannot write in"):
            api.fit(_table(), model="no-pooling", out=locked / "new" / "run")
    finally:
        locked.chmod(0o755)
    assert list(tmp_path.glob(".*")) == []


def test_clean_staging_removes_dead_writers_only(tmp_path):
    dead = tmp_path / ".run.999999999.abcd.part"     # no such process
    alive = tmp_path / f".run.{os.getppid()}.abcd.part"
    fresh = tmp_path / ".run.abcd.part"              # no PID (older layout), just made
    stale = tmp_path / ".run.efgh.old"
    other = tmp_path / ".runner.999999999.x.part"    # another folder's staging
    for p in (dead, alive, fresh, stale, other):
        p.mkdir()
        (p / "estimates.csv").write_text("x")
    old = time.time() - 3600
    os.utime(stale, (old, old))
    removed = runfolder.clean_staging(tmp_path, "run")
    assert sorted(removed) == sorted([dead, stale])
    assert alive.exists() and fresh.exists() and other.exists()


def test_the_next_fit_removes_a_killed_runs_staging(run):
    leftover = run.parent / ".run.999999999.k1ll.part"
    leftover.mkdir()
    (leftover / "posterior.nc").write_bytes(b"half")
    api.fit(_table(), model="no-pooling", seed=3, out=run, checks=False)
    assert not leftover.exists()


def test_a_failing_update_leaves_the_old_folder_and_no_staging(run, monkeypatch):
    from workbench import steps

    before = _snapshot(run)

    def broken(folder, **_):
        (Path(folder) / "report.html").write_text("half a report")
        raise RuntimeError("disk full, say")

    monkeypatch.setattr(steps, "render_into", broken)
    with pytest.raises(RuntimeError):
        api.write_report(run)
    assert _snapshot(run) == before
    assert [p.name for p in run.parent.iterdir() if p.name.startswith(".")] == []


def test_two_writers_finishing_together_both_succeed(tmp_path, monkeypatch):
    # the other writer lands its folder exactly between our two renames
    out = tmp_path / "run"
    real = os.replace
    state = {"done": False}

    def racing(src, dst):
        if Path(dst) == out and str(src).endswith(".part") and not state["done"]:
            state["done"] = True
            out.mkdir()
            (out / "theirs.txt").write_text("the other writer's complete folder")
        return real(src, dst)

    monkeypatch.setattr(atomic.os, "replace", racing)
    atomic.swap_in(out, lambda d: (d / "ours.txt").write_text("ours"))
    assert sorted(p.name for p in out.iterdir()) == ["ours.txt"]
    assert [p.name for p in tmp_path.iterdir()] == ["run"]


def test_two_threads_writing_one_folder_never_raise(tmp_path):
    out = tmp_path / "run"
    gate = threading.Barrier(2)
    errors = []

    def writer(tag):
        def fill(d):
            (d / "who.txt").write_text(tag)
            gate.wait()
        try:
            atomic.swap_in(out, fill)
        except Exception as exc:  # noqa: BLE001 - the test collects any error
            errors.append(exc)

    threads = [threading.Thread(target=writer, args=(t,)) for t in "ab"]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    assert (out / "who.txt").read_text() in ("a", "b")
    assert [p.name for p in tmp_path.iterdir()] == ["run"]


# -- spreadsheet formulas ---------------------------------------------------------------------


def test_write_csv_guards_formulas_and_read_table_undoes_it(tmp_path):
    # the rule follows OWASP's CSV injection guidance: =, +, -, @, tab, carriage return
    table = pd.DataFrame({"group": FORMULA_NAMES, "value": range(len(FORMULA_NAMES)),
                          "delta": [-0.5] * len(FORMULA_NAMES)})
    path = tmp_path / "t.csv"
    atomic.write_csv(path, table)
    with open(path, newline="", encoding="utf-8") as f:
        written = [row[0] for row in list(csv.reader(f))[1:]]
    assert written == ["'=1+1", "'+x", "'-3", "'@a", "'\t=x", "'\r=y", "''=x", "'''+y", "ok",
                       "'plain"]
    back = runfolder.read_table(path)
    assert back["group"].tolist() == FORMULA_NAMES
    assert back["delta"].tolist() == [-0.5] * len(FORMULA_NAMES)  # numbers untouched
    assert table["group"].tolist() == FORMULA_NAMES  # the caller's table is not changed


def _looks_like_number(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return False
    return True


def test_every_csv_of_a_run_folder_is_safe_and_names_round_trip(tmp_path):
    out = tmp_path / "run"
    names = [n for n in FORMULA_NAMES if n != "ok"]
    api.fit(_table(names), model="no-pooling", seed=2, out=out, predict_trials=10,
            target=0.3, compare_groups=",".join(names[:3]).replace("\r", "r"))
    for path in out.glob("*.csv"):
        with open(path, newline="", encoding="utf-8") as f:
            for row in csv.reader(f):
                for cell in row:
                    if cell[:1] in atomic.FORMULA_STARTS:
                        assert _looks_like_number(cell), (path.name, cell)
    folder = runfolder.read_folder(out)
    assert folder.estimates["group"].tolist() == names
    assert set(folder.tables["predictions"]["group"]) >= set(names)
    record = json.loads((out / "run.json").read_text())
    assert record["input"]["groups"] == len(names)
    posterior_names = [str(g) for g in folder.idata.posterior["group"].values]
    assert posterior_names == names  # raw names stay in posterior.nc
