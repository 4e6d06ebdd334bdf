"""Generated tables (over 2,000 per run): a correct result or one DataError line, never a
changed count, never a foreign exception (issue 13, "never miscount").

Each table is built with the answer known by construction: every count cell is drawn from
a list of spellings that are counts (with their value) or are not (no value). So the oracle
does not share code with the reader: a table whose cells are all counts must load with
exactly the summed counts; a table with any other cell must be refused in one line that
names a row. Cheap by design: the input layer and the closed-form no-pooling fit in-process.
"""

from __future__ import annotations

import csv
import io
import tempfile
from collections import defaultdict
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

hypothesis = pytest.importorskip("hypothesis")
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402
from scipy import stats  # noqa: E402
from workbench.models import DataError, NoPooling  # noqa: E402

from workbench.io.inputs import _parse_counts, load_groups, read_count  # noqa: E402

#: examples per test; their sum is the number of generated tables a run checks
EXAMPLES = {"csv": 1000, "frame": 600, "vector": 400, "fit": 40}
TABLES_PER_RUN = sum(EXAMPLES.values())
assert TABLES_PER_RUN >= 2000

_DIR = tempfile.TemporaryDirectory(prefix="workbench-props-")

# -- count cells with known meaning ------------------------------------------------------------

good_text = st.integers(0, 10**6).flatmap(lambda v: st.sampled_from([
    (str(v), v), (f"{v}.0", v), (f"{v}.00", v), (f" {v}", v), (f"{v} ", v), (f"00{v}", v)]))
bad_text = st.one_of(
    st.sampled_from(["", " ", "1_0", "1_000", "１０", "٣", "۴", "५", "1e3", "1E2", "+5", "-1",
                     "-0", "0x1F", "1,000", "1.5", "2.", ".0", "inf", "-inf", "nan", "NaN",
                     "None", "true", "ten", "5\u00a0", "½", "²", "1 000", "9" * 17]),
    st.integers(1, 10**6).map(lambda v: f"{v}.5"),
    st.text(alphabet="abcxyz!?#%&", min_size=1, max_size=4),
).map(lambda t: (t, None))
text_cell = st.one_of(good_text, good_text, good_text, bad_text)

good_value = st.one_of(
    st.integers(0, 10**6).map(lambda v: (v, v)),
    st.integers(0, 10**6).map(lambda v: (np.int64(v), v)),
    st.integers(0, 10**6).map(lambda v: (float(v), v)),
    good_text,
)
bad_value = st.one_of(
    bad_text,
    st.sampled_from([True, False, None, float("nan"), float("inf"), -1, -2.0, 0.5, 10**16,
                     np.float64(3.25)]).map(lambda v: (v, None)),
)
value_cell = st.one_of(good_value, good_value, good_value, bad_value)

# group names: any printable text (quotes, commas, newlines, formula characters, other
# scripts) without leading or trailing whitespace, which the CSV reader may trim
name = st.text(
    alphabet=st.characters(blacklist_categories=("Cs", "Cc"), blacklist_characters="\r")
    | st.sampled_from(list("\n\t,\"'=+-@")), min_size=1, max_size=6,
).map(str.strip).filter(lambda s: s != "" and s != "(new group)")


def _rows(cell):
    return st.lists(st.tuples(st.sampled_from(["a", "b"]) | name, cell, cell), min_size=1,
                    max_size=8)


def _expected(rows):
    """Counts per group, or None when some row must be refused."""
    sums: dict = defaultdict(lambda: [0, 0])
    for group, (_, y), (_, n) in rows:
        if y is None or n is None or y > n:
            return None
        sums[group][0] += y
        sums[group][1] += n
    return dict(sums)


def _check(rows, load):
    expected = _expected(rows)
    try:
        loaded = load()
    except DataError as exc:
        message = str(exc)
        assert "\n" not in message and message.startswith("row "), message
        assert expected is None, f"refused a valid table: {message}"
        return
    assert expected is not None, "a table with a cell that is not a count was accepted"
    c = loaded.counts
    got = {str(g): [int(y), int(n)] for g, y, n in zip(c.names, c.successes, c.trials,
                                                       strict=True)}
    assert got == {str(k): v for k, v in expected.items()}  # not one count changed
    assert loaded.reconciliation["rows_used"] == len(rows)


@pytest.mark.slow
@settings(max_examples=EXAMPLES["csv"], deadline=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(_rows(text_cell))
def test_csv_tables_load_exactly_or_are_refused_in_one_line(rows):
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(["group", "successes", "trials"])
    for g, (y, _), (n, _) in rows:
        writer.writerow([g, y, n])
    path = Path(_DIR.name) / "t.csv"
    path.write_text(buf.getvalue(), encoding="utf-8")
    _check(rows, lambda: load_groups(path))


@pytest.mark.slow
@settings(max_examples=EXAMPLES["frame"], deadline=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(_rows(value_cell))
def test_dataframes_of_mixed_cells_load_exactly_or_are_refused(rows):
    frame = pd.DataFrame({"group": [g for g, _, _ in rows],
                          "successes": pd.Series([y for _, (y, _), _ in rows], dtype=object),
                          "trials": pd.Series([n for _, _, (n, _) in rows], dtype=object)})
    _check(rows, lambda: load_groups(frame))


@pytest.mark.slow
@settings(max_examples=EXAMPLES["vector"], deadline=None)
@given(st.lists(st.one_of(text_cell, st.text(max_size=5).map(lambda t: (t, "?"))),
                min_size=1, max_size=30))
def test_vectorised_rule_equals_the_cell_rule(cells):
    # the whole-column fast path and read_count agree cell by cell, on any text
    texts = [t for t, _ in cells]
    problems: list = []
    out = _parse_counts(pd.Series(texts, dtype=object), "c", pd.Series(texts), problems)
    refused = {i for i, _ in problems}
    for i, t in enumerate(texts):
        number, why = read_count(t)
        assert (i in refused) == (number is None), t
        if number is not None:
            assert out[i] == number
        known = cells[i][1]
        if known != "?":
            assert number == known, t


@pytest.mark.slow
@settings(max_examples=EXAMPLES["fit"], deadline=None)
@given(st.lists(st.tuples(st.integers(0, 500), st.integers(0, 500)), min_size=1,
                max_size=6))
def test_no_pooling_fit_of_loaded_counts_matches_scipy_beta(pairs):
    # no pooling: each rate's posterior is Beta(1 + y, 1 + n - y) (conjugacy, common practice);
    # the reference is scipy.stats.beta
    rows = [(f"g{i}", min(a, b), max(a, b)) for i, (a, b) in enumerate(pairs)]
    frame = pd.DataFrame(rows, columns=["group", "successes", "trials"]).astype(str)
    c = load_groups(frame).counts
    assert c.successes.tolist() == [r[1] for r in rows]
    assert c.trials.tolist() == [r[2] for r in rows]
    table = NoPooling(draws=20, chains=1, random_seed=0).fit(c).summary(0.9)
    for (_, y, n), (_, row) in zip(rows, table.iterrows(), strict=True):
        ref = stats.beta(1 + y, 1 + n - y)
        assert row["posterior_mean"] == pytest.approx(ref.mean(), rel=1e-9)
        assert row["lower"] == pytest.approx(ref.ppf(0.05), rel=1e-6, abs=1e-12)
        assert row["upper"] == pytest.approx(ref.ppf(0.95), rel=1e-6, abs=1e-12)
