"""The DuckDB reader against the pandas reader (workbench.io.inputs) and pandas' own groupby."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

duckdb = pytest.importorskip("duckdb")

from workbench.models import DataError, ParameterError  # noqa: E402

from workbench.io import events  # noqa: E402
from workbench.io.inputs import load_groups  # noqa: E402


def _events_frame(rows: int = 30_000, groups: int = 40, seed: int = 3) -> pd.DataFrame:
    """Invented event log: one row per trial, groups in shuffled first-appearance order."""
    rng = np.random.default_rng(seed)
    g = rng.integers(0, groups, size=rows)
    return pd.DataFrame({"site": [f"site-{i:02d}" for i in g],
                         "done": rng.integers(0, 2, size=rows).astype("int8")})


def _same(a, b) -> None:
    assert a.counts.names.tolist() == b.counts.names.tolist()
    assert np.array_equal(a.counts.successes, b.counts.successes)
    assert np.array_equal(a.counts.trials, b.counts.trials)
    assert a.reconciliation == b.reconciliation
    assert a.notes == b.notes


@pytest.mark.parametrize("suffix", [".csv", ".parquet", ".tsv"])
def test_event_log_equals_pandas_reader_and_groupby(tmp_path, suffix):
    frame = _events_frame()
    path = tmp_path / f"log{suffix}"
    if suffix == ".parquet":
        frame.to_parquet(path)
    else:
        frame.to_csv(path, index=False, sep="\t" if suffix == ".tsv" else ",")
    duck = events.load_events(path, group="site", outcome="done")
    _same(duck, load_groups(path, group="site", outcome="done"))
    # outside reference: pandas' own groupby in first-appearance order
    truth = frame.groupby("site", sort=False)["done"].agg(["sum", "size"])
    assert duck.counts.names.tolist() == truth.index.tolist()
    assert duck.counts.successes.tolist() == truth["sum"].tolist()
    assert duck.counts.trials.tolist() == truth["size"].tolist()
    assert duck.reconciliation["rows_read"] == len(frame)


def test_partial_counts_with_repeats_and_zero_trials_equal_pandas(tmp_path):
    path = tmp_path / "counts.csv"
    path.write_text("unit,wins,tries\nb,1,4\n a,2,5\nb,3.0,3\nz,0,0\nc,007,10\n")
    duck = events.load_events(path, group="unit", successes="wins", trials="tries")
    _same(duck, load_groups(path, group="unit", successes="wins", trials="tries"))
    assert duck.counts.names.tolist() == ["b", "a", "z", "c"]  # skipinitialspace as pandas
    assert duck.counts.successes.tolist() == [4, 2, 0, 7]
    assert duck.reconciliation["groups_on_several_rows"] == 1
    assert duck.reconciliation["zero_trial_groups"] == ["z"]


def _message(reader, *args, **kw) -> str:
    with pytest.raises(DataError) as info:
        reader(*args, **kw)
    text = str(info.value)
    assert "\n" not in text
    return text


def test_bad_cells_give_the_same_one_line_message(tmp_path):
    path = tmp_path / "bad.csv"
    path.write_text('group,successes,trials\n a ,3,2\n,1,2\nb,x,3\nc,1.5,\nd,-1,4\n'
                    'e,1e3,2000\n"f\ng",1_0,20\n')
    duck = _message(events.load_events, path)
    assert duck == _message(load_groups, path)
    assert "row 1 (line 2) (group 'a '): successes=3 exceeds trials=2" in duck
    assert duck.endswith("and 3 more problems.")  # 8 problems, 5 described
    # a quoted name over two lines moves the line, not the row
    later = tmp_path / "later.csv"
    later.write_text('group,successes,trials\n"f\ng",1,2\nh,5,4\n')
    assert _message(events.load_events, later) == _message(load_groups, later)
    assert "row 2 (line 4)" in _message(events.load_events, later)


def test_bad_outcomes_and_parquet_cells_give_the_same_message(tmp_path):
    path = tmp_path / "log.csv"
    path.write_text("group,outcome\na,1\nb,maybe\n,yes\nc,Y\nd,2\n")
    assert _message(events.load_events, path, outcome="outcome") == _message(
        load_groups, path, outcome="outcome")
    frame = pd.DataFrame({"group": ["a", "b", None, "c"], "successes": [1.0, np.nan, 2.0, 2.5],
                          "trials": [3, 4, 5, 6]})
    pq = tmp_path / "counts.parquet"
    frame.to_parquet(pq)
    duck = _message(events.load_events, pq)
    assert duck == _message(load_groups, pq)
    assert duck.startswith("row 2 (group 'b')")


def test_missing_column_message_is_the_pandas_one(tmp_path):
    path = tmp_path / "log.parquet"
    _events_frame(100).to_parquet(path)
    assert _message(events.load_events, path, group="site", outcome="outcome") == _message(
        load_groups, path, group="site", outcome="outcome")


def test_query_over_the_data_view_and_a_database_file(tmp_path):
    frame = _events_frame(5_000)
    path = tmp_path / "log.parquet"
    frame.to_parquet(path)
    sql = ("SELECT site AS g, sum(done) AS s, count(*) AS n FROM data"
           " GROUP BY site ORDER BY site")
    got = events.load_events(path, group="g", successes="s", trials="n", query=sql)
    truth = frame.groupby("site")["done"].agg(["sum", "size"])  # sorted, as the query orders
    assert got.counts.names.tolist() == truth.index.tolist()
    assert got.counts.successes.tolist() == truth["sum"].tolist()
    assert got.reconciliation["source"] == f"the query over {path}"
    db = tmp_path / "store.duckdb"
    con = duckdb.connect(str(db))
    con.execute(f"CREATE TABLE trial_log AS SELECT * FROM read_parquet('{path}')")
    con.close()
    got = events.load_events(db, group="site", outcome="done",
                             query="SELECT site, done FROM trial_log")
    assert sorted(got.counts.names.tolist()) == truth.index.tolist()
    by_name = dict(zip(got.counts.names, got.counts.trials, strict=True))
    assert [by_name[k] for k in truth.index] == truth["size"].tolist()
    with pytest.raises(ParameterError, match="DuckDB database"):
        events.load_events(db, group="site", outcome="done")
    with pytest.raises(DataError, match="cannot run the query"):
        events.load_events(path, query="SELECT * FROM no_such_table")


def test_memory_limit_is_set():
    con = events.connect(memory_limit="300MB")
    # DuckDB reports the limit in its own units (MiB-based): about 300 MB
    shown = con.execute("SELECT current_setting('memory_limit')").fetchone()[0]
    con.close()
    assert shown.endswith("MiB") and 280 <= float(shown.split()[0]) <= 300


def test_when_the_duckdb_reader_is_used(tmp_path):
    small = tmp_path / "counts.csv"
    small.write_text("group,successes,trials\na,1,2\n")
    assert not events.wanted(small)
    assert events.wanted(small, outcome="outcome")
    assert events.wanted(small, query="SELECT 1")
    assert not events.wanted(small, outcome="outcome", covariates=("x",))
    with pytest.raises(ParameterError, match="covariates"):
        events.wanted(small, query="SELECT 1", covariates=("x",))


@pytest.mark.slow  # a whole fit (about 10 s with start-up)
def test_fit_records_the_query(tmp_path):
    from workbench import api
    from workbench.io.runfolder import path_of

    frame = _events_frame(3_000, groups=12)
    path = tmp_path / "log.parquet"
    frame.to_parquet(path)
    sql = "SELECT site, done FROM data WHERE site <> 'site-00'"
    run = api.fit(path, group="site", outcome="done", query=sql, seed=1, checks=False,
                  out=tmp_path / "run")
    record = json.loads(path_of(run.path, "record").read_text())
    assert record["settings"]["query"] == sql
    assert "site-00" not in run.estimates["group"].tolist()
    assert run.loaded.reconciliation["rows_read"] == int((frame["site"] != "site-00").sum())
