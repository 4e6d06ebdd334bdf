"""The Dask path (--dask / dask=) against the single-machine path, on a two-worker cluster.

References outside the readers under test: pandas' own groupby for the counts; the
single-machine fit (same seed) for every estimate. Columns the cluster computes in closed
form are compared to 1e-12 (the same formulas; only the rounding of a matrix product may
differ); every other column (ranks, top/bottom chances, flags, trials needed: drawn on this
machine from the same seed) must be identical.
"""

from __future__ import annotations

import json
import time

import numpy as np
import pandas as pd
import pytest

dd = pytest.importorskip("dask.dataframe")
distributed = pytest.importorskip("distributed")

from workbench.models import BetaBinomial, DataError, ParameterError  # noqa: E402

from workbench import api  # noqa: E402
from workbench.analysis import partitioned  # noqa: E402
from workbench.cli import main  # noqa: E402
from workbench.io import cluster, events  # noqa: E402
from workbench.io.inputs import load_groups  # noqa: E402
from workbench.io.runfolder import path_of  # noqa: E402

#: bytes per CSV block in these tests, so that small files span several partitions
BLOCK = 20_000
#: the columns the cluster computes in closed form
CLOSED = ["posterior_mean", "posterior_median", "lower", "upper", "shrinkage",
          "prob_above_target"]


@pytest.fixture(scope="module")
def client():
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as lc, \
            distributed.Client(lc, set_as_default=False) as c:
        yield c


@pytest.fixture(autouse=True)
def _small_blocks(monkeypatch):
    monkeypatch.setattr(cluster, "BLOCKSIZE", BLOCK)


def _events_frame(rows: int = 6_000, groups: int = 30, seed: int = 5) -> pd.DataFrame:
    """Invented event log: one row per visit, outcome 1/0 or words, groups shuffled."""
    rng = np.random.default_rng(seed)
    g = rng.integers(0, groups, size=rows)
    rate = rng.beta(3, 9, size=groups)
    done = (rng.random(rows) < rate[g]).astype("int8")
    return pd.DataFrame({"desk": [f"desk-{i:02d}" for i in g], "done": done})


def _same(a, b) -> None:
    assert a.counts.names.tolist() == b.counts.names.tolist()
    assert np.array_equal(a.counts.successes, b.counts.successes)
    assert np.array_equal(a.counts.trials, b.counts.trials)
    assert a.reconciliation == b.reconciliation
    assert a.notes == b.notes


@pytest.mark.slow  # a whole process or several fits: seconds (iterate with -m 'not slow')
@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_event_log_on_the_cluster_equals_pandas_duckdb_and_groupby(tmp_path, client, suffix,
                                                                   monkeypatch):
    frame = _events_frame()
    path = tmp_path / f"visits{suffix}"
    if suffix == ".parquet":
        frame.to_parquet(path, row_group_size=1_000)  # row groups of about 1.2 kB
        monkeypatch.setattr(cluster, "BLOCKSIZE", 2_000)
        assert dd.read_parquet(path, blocksize=2_000).npartitions > 1
    else:
        frame.to_csv(path, index=False)
        assert dd.read_csv(path, blocksize=BLOCK, dtype=str).npartitions > 1
    got = cluster.load_on_cluster(path, client, group="desk", outcome="done")
    _same(got, load_groups(path, group="desk", outcome="done"))
    _same(got, events.load_events(path, group="desk", outcome="done"))
    truth = frame.groupby("desk", sort=False)["done"].agg(["sum", "size"])  # pandas itself
    assert got.counts.names.tolist() == truth.index.tolist()
    assert got.counts.successes.tolist() == truth["sum"].tolist()
    assert got.counts.trials.tolist() == truth["size"].tolist()


@pytest.mark.slow
def test_partial_counts_with_repeats_and_words_equal_the_pandas_reader(tmp_path, client):
    rng = np.random.default_rng(8)
    names = [f"bay {i}" for i in rng.integers(0, 50, size=3_000)]
    trials = rng.integers(0, 30, size=3_000)
    wins = rng.integers(0, trials + 1)
    text = [f"{w}.0" if k % 7 == 0 else f" {w:03d}" for k, w in enumerate(wins)]
    path = tmp_path / "bays.csv"
    pd.DataFrame({"bay": names, "wins": text, "tries": trials}).to_csv(path, index=False)
    assert dd.read_csv(path, blocksize=BLOCK, dtype=str).npartitions > 1
    got = cluster.load_on_cluster(path, client, group="bay", successes="wins", trials="tries")
    _same(got, load_groups(path, group="bay", successes="wins", trials="tries"))
    assert got.reconciliation["groups_on_several_rows"] == 50


@pytest.mark.slow  # starts a two-worker Dask cluster (about 5 s with its start and stop)
def test_bad_rows_in_several_partitions_give_the_pandas_readers_message(tmp_path, client):
    frame = _events_frame(rows=4_000).astype({"done": str})
    frame.loc[[3, 1_900, 2_500, 3_999], "done"] = ["maybe", "2", "", "yes!"]
    frame.loc[[10, 3_000], "desk"] = ["  ", "desk-03"]
    frame.loc[3_000, "done"] = "-1"
    path = tmp_path / "visits.csv"
    frame.to_csv(path, index=False)
    assert dd.read_csv(path, blocksize=BLOCK, dtype=str).npartitions > 1
    with pytest.raises(DataError) as single:
        load_groups(path, group="desk", outcome="done")
    with pytest.raises(DataError) as on_cluster:
        cluster.load_on_cluster(path, client, group="desk", outcome="done")
    assert str(on_cluster.value) == str(single.value)
    assert "row 4 (line 5)" in str(on_cluster.value)  # the first problem, named by line
    assert "\n" not in str(on_cluster.value) and "1 more" in str(on_cluster.value)


@pytest.mark.slow  # a whole process or several fits: seconds (iterate with -m 'not slow')
def test_the_dask_fit_equals_the_single_machine_fit(tmp_path, client, capsys):
    path = tmp_path / "visits.csv"
    _events_frame().to_csv(path, index=False)
    common = dict(group="desk", outcome="done", seed=11, checks=False, target=0.25)
    here = api.fit(path, **common)
    started = time.perf_counter()
    out = tmp_path / "run"
    code = main(["fit", str(path), "--group", "desk", "--outcome", "done", "--seed", "11",
                 "--no-checks", "--target", "0.25", "--dask", client.scheduler.address,
                 "--out", str(out), "--quiet"])
    seconds = time.perf_counter() - started
    assert code == 0, capsys.readouterr().err
    record = json.loads(path_of(out, "record").read_text())
    assert record["settings"]["dask"] == client.scheduler.address  # the address, no client
    assert record["cluster"]["workers"] == 2
    assert record["cluster"]["read_on"] == record["cluster"]["scored_on"] == "cluster"
    assert record["cluster"]["partitions"] > 1
    assert record["input"] == json.loads(json.dumps(
        {"fingerprint": here.loaded.counts.fingerprint(), **here.loaded.reconciliation}))
    api.write_run(here, tmp_path / "here")
    _same_estimates(pd.read_csv(path_of(out, "estimates")),
                    pd.read_csv(path_of(tmp_path / "here", "estimates")), atol=1e-12)
    # from Python, with the client itself
    run = api.fit(path, dask=client, **common)
    _same_estimates(run.estimates, here.estimates, atol=1e-12)
    pd.testing.assert_frame_equal(run.population, here.population)
    assert seconds < 60


def _same_estimates(got: pd.DataFrame, want: pd.DataFrame, *, atol: float) -> None:
    assert list(got.columns) == list(want.columns)
    for column in want.columns:
        if column in CLOSED:
            np.testing.assert_allclose(got[column], want[column], rtol=0, atol=atol,
                                       err_msg=column)
        else:  # drawn on this machine from the same seed: identical
            pd.testing.assert_series_equal(got[column], want[column])


@pytest.mark.slow
@pytest.mark.parametrize("exact_quantiles", [True, False])
def test_partition_scoring_equals_the_estimators_summary(client, monkeypatch, exact_quantiles):
    from helpers import simulate

    counts = simulate(groups=120, seed=4)[0]
    if not exact_quantiles:  # too many cells for exact quantiles: intervals from the draws
        from workbench.models import _mixture

        monkeypatch.setattr(_mixture, "EXACT_QUANTILE_CELLS", 0)
    est = BetaBinomial(draws=200, chains=2, random_seed=2).fit(counts)
    assert est.exact_.exact_quantiles is exact_quantiles
    table, record = partitioned.score_on_cluster(client, est, 0.9, 0.3, partitions=5)
    want = est.summary(0.9, target=0.3)
    assert record["partitions"] == 5
    pd.testing.assert_frame_equal(table[["group", "successes", "trials"]],
                                  want[["group", "successes", "trials"]])
    for column in [*CLOSED, "observed_rate"]:
        np.testing.assert_allclose(table[column], want[column], rtol=0, atol=1e-12,
                                   err_msg=column)


def test_unreachable_scheduler_is_one_error_line_before_any_work(tmp_path, capsys,
                                                                 monkeypatch):
    monkeypatch.setattr(cluster, "CONNECT_TIMEOUT", 2.0)
    from workbench import pipeline

    def no_work(*args, **kwargs):
        raise AssertionError("read before the scheduler answered")

    monkeypatch.setattr(pipeline, "load", no_work)
    path = tmp_path / "visits.csv"
    _events_frame(rows=50).to_csv(path, index=False)
    out = tmp_path / "run"
    code = main(["fit", str(path), "--group", "desk", "--outcome", "done",
                 "--dask", "tcp://127.0.0.1:9", "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: --dask tcp://127.0.0.1:9: no Dask")
    assert not out.exists()


def test_a_malformed_address_is_refused_without_waiting(tmp_path, capsys):
    path = tmp_path / "visits.csv"
    _events_frame(rows=50).to_csv(path, index=False)
    started = time.perf_counter()
    code = main(["fit", str(path), "--group", "desk", "--outcome", "done", "--dask", "nowhere"])
    lines = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(lines) == 1
    assert lines[0].startswith("error: --dask nowhere: not a scheduler address")
    assert time.perf_counter() - started < cluster.CONNECT_TIMEOUT


def test_what_the_cluster_reader_does_not_take_is_refused_before_connecting(tmp_path):
    frame = _events_frame(rows=50)
    with pytest.raises(ParameterError, match="dask= reads a file path on the cluster"):
        api.fit(frame, group="desk", outcome="done", dask="tcp://127.0.0.1:9")
    with pytest.raises(ParameterError, match="query= runs in DuckDB"):
        api.fit(tmp_path / "x.csv", query="SELECT 1", dask="tcp://127.0.0.1:9")
    with pytest.raises(ParameterError, match="dask=' ': must be a non-empty text"):
        api.fit(tmp_path / "x.csv", dask=" ")
