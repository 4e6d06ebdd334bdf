"""The fast CSV encoder writes pandas' bytes, and says when it leaves a table to pandas.

The reference throughout is pandas' own writer: ``DataFrame.to_csv(path, index=False,
float_format="%.10g", quoting=...)`` on the same frame, after the spreadsheet guard applied
cell by cell in Python (:func:`workbench.io.atomic.neutralise`), which is what write_csv did
before the fast path. For single floats the reference is Python's ``"%.10g" % value``, the
operation pandas' writer applies to each float.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from helpers import estimates_like
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from workbench import api
from workbench.io import atomic, fast_csv


def _reference_bytes(table: pd.DataFrame, path: Path) -> bytes:
    """What write_csv wrote before the fast path: guard each text cell and label in Python,
    QUOTE_NONNUMERIC when a text cell or label holds "\\r", then pandas' to_csv."""
    out = table.copy()
    for name in out.columns:
        col = out[name]
        if col.dtype.kind == "O" or str(col.dtype) in ("string", "str"):
            values = col.to_numpy(dtype=object)
            if any(atomic.neutralise(v) is not v for v in values):
                out[name] = pd.Series([atomic.neutralise(v) for v in values], index=col.index,
                                      dtype=object)
    out = out.set_axis([atomic.neutralise(str(c)) for c in out.columns], axis=1)
    text_cells = [v for c in out.columns
                  if out[c].dtype.kind == "O" or str(out[c].dtype) in ("string", "str")
                  for v in out[c].to_numpy(dtype=object) if isinstance(v, str)]
    carriage = any("\r" in c for c in out.columns) or any("\r" in v for v in text_cells)
    quoting = csv.QUOTE_NONNUMERIC if carriage else csv.QUOTE_MINIMAL
    out.to_csv(path, index=False, float_format="%.10g", quoting=quoting)
    return path.read_bytes()


def _fast_bytes(table: pd.DataFrame, path: Path, monkeypatch) -> bytes:
    """write_csv's bytes with the fast path taken at any length; asserts it was taken."""
    monkeypatch.setattr(atomic, "FAST_CSV_MIN_ROWS", 0)
    taken = []
    real = fast_csv.Plan.write
    monkeypatch.setattr(fast_csv.Plan, "write", lambda self, p: (taken.append(p),
                                                                  real(self, p))[1])
    atomic.write_csv(path, table)
    assert taken, "write_csv left this table to pandas"
    return path.read_bytes()


# ------------------------------------------------------------------------------ floats

#: the float_format write_csv hands pandas
PANDAS_FLOAT_FORMAT = "%.10g"

SPECIAL_FLOATS = [0.0, -0.0, np.inf, -np.inf, np.nan, 1e-5, 1.5e20, 1e-4, 9.999999999e-5,
                  12345678905.0, 12345678915.0, 0.5, 2.5, 9999999999.5, 999999999.95,
                  0.99999999995, 9.9999999995, 1e10, 1e9, 5e-324, 2.2250738585072014e-308,
                  1.7976931348623157e308, 1 / 3, -2 / 3, 0.1, 123456789.0, 1234567890.0,
                  12345678901.0, 1e100, 1.0000000005, 1e-300, 6.02214076e23]


def test_floats_match_python_percent_format_on_random_bit_patterns():
    rng = np.random.default_rng(7)
    bits = rng.integers(0, 2**64, 150_000, dtype=np.uint64, endpoint=False)
    decimals = np.round(rng.uniform(-1e6, 1e6, 50_000), rng.integers(0, 9))
    powers = 10.0 ** np.arange(-323, 309)
    x = np.concatenate([bits.view(np.float64), decimals, powers, np.nextafter(powers, 0),
                        np.nextafter(powers, np.inf), SPECIAL_FLOATS])
    got = fast_csv.format_floats(x).to_pylist()
    # reference: Python's own "%.10g" % v (what pandas' float_format does), "" for NaN
    want = ["" if v != v else PANDAS_FLOAT_FORMAT % v for v in x.tolist()]
    assert [(v, g) for v, g, w in zip(x.tolist(), got, want, strict=True) if g != w] == []
    # and the vectorised digits, not Python's %, made almost all of them
    assert fast_csv.python_formatted(x).mean() < 0.01


def test_float32_widens_as_percent_format_does():
    x = np.array([0.1, 1 / 3, 3.4e38, 1e-45, -0.0, np.nan], dtype=np.float32)
    # reference: Python's "%.10g" of each float32 value, as pandas applies it
    assert fast_csv.format_floats(x).to_pylist() == [
        "" if v != v else PANDAS_FLOAT_FORMAT % v for v in x]


# ------------------------------------------------------------------------------- tables

TEXT = st.text(st.characters(blacklist_categories=("Cs",)), max_size=6) | st.sampled_from(
    ["a,b", 'q"t', "l\nm", "r\rs", "=1+1", "+x", "-3", "@a", "\t=x", "'=x", "''+y", "",
     " pad ", "ünï", "名前", "\x00", '"', ",", "\n"])
FLOAT = st.floats(allow_nan=True, allow_infinity=True) | st.sampled_from(SPECIAL_FLOATS)


def _column(kind: str, n: int):
    if kind == "float64":
        return st.lists(FLOAT, min_size=n, max_size=n).map(lambda v: np.array(v, np.float64))
    if kind == "float32":
        return st.lists(st.floats(width=32, allow_nan=True), min_size=n, max_size=n).map(
            lambda v: np.array(v, np.float32))
    if kind == "int64":
        return st.lists(st.integers(-2**63, 2**63 - 1), min_size=n, max_size=n).map(
            lambda v: np.array(v, np.int64))
    if kind == "uint8":
        return st.lists(st.integers(0, 255), min_size=n, max_size=n).map(
            lambda v: np.array(v, np.uint8))
    if kind == "bool":
        return st.lists(st.booleans(), min_size=n, max_size=n).map(lambda v: np.array(v))
    if kind == "Int64":
        return st.lists(st.none() | st.integers(-10**12, 10**12), min_size=n, max_size=n).map(
            lambda v: pd.array(v, dtype="Int64"))
    if kind == "boolean":
        return st.lists(st.none() | st.booleans(), min_size=n, max_size=n).map(
            lambda v: pd.array(v, dtype="boolean"))
    if kind == "Float64":
        return st.lists(st.none() | st.floats(allow_nan=False), min_size=n, max_size=n).map(
            lambda v: pd.array(v, dtype="Float64"))
    if kind == "object":
        return st.lists(st.none() | st.just(np.nan) | TEXT, min_size=n, max_size=n).map(
            lambda v: np.array(v, dtype=object))
    assert kind == "str"
    return st.lists(st.none() | TEXT, min_size=n, max_size=n).map(
        lambda v: pd.array(v, dtype="str"))


KINDS = ["float64", "float32", "int64", "uint8", "bool", "Int64", "boolean", "Float64",
         "object", "str"]


@st.composite
def tables(draw):
    n = draw(st.integers(0, 12))
    kinds = draw(st.lists(st.sampled_from(KINDS), min_size=1, max_size=6))
    names = draw(st.lists(TEXT, min_size=len(kinds), max_size=len(kinds), unique=True))
    return pd.DataFrame({name: draw(_column(kind, n)) for name, kind in zip(names, kinds,
                                                                             strict=True)})


def _same_bytes_as_pandas(table, tmp_path, monkeypatch):
    # reference: pandas' to_csv of the same frame (see _reference_bytes)
    want = _reference_bytes(table, tmp_path / "reference.csv")
    assert _fast_bytes(table, tmp_path / "fast.csv", monkeypatch) == want


_FIXTURES_OK = [HealthCheck.function_scoped_fixture, HealthCheck.too_slow]


@pytest.mark.slow  # 250 generated tables, each written twice: about 5 s
@settings(max_examples=250, deadline=None, suppress_health_check=_FIXTURES_OK)
@given(table=tables())
def test_any_table_of_handled_columns_is_pandas_bytes(table, tmp_path, monkeypatch):
    _same_bytes_as_pandas(table, tmp_path, monkeypatch)


@settings(max_examples=30, deadline=None, suppress_health_check=_FIXTURES_OK)
@given(table=tables())
def test_a_few_generated_tables_are_pandas_bytes(table, tmp_path, monkeypatch):
    # the quick run's share of the test above (under a second)
    _same_bytes_as_pandas(table, tmp_path, monkeypatch)


def test_quoting_cases_by_hand(tmp_path, monkeypatch):
    table = pd.DataFrame({
        "name, with comma": ["a,b", 'say "hi"', "two\nlines", "", None, "=SUM(A1)", "名"],
        'q"': [1.5, np.nan, -0.0, np.inf, 1e-5, 1.5e20, 12345678905.0],
        "n": np.arange(7), "flag": [True, False] * 3 + [True],
    })
    # reference: pandas' to_csv of the same frame
    assert (_fast_bytes(table, tmp_path / "f.csv", monkeypatch)
            == _reference_bytes(table, tmp_path / "r.csv"))
    one = pd.DataFrame({"": ["", None, "x"]})  # a record that is one empty field is '""'
    assert (_fast_bytes(one, tmp_path / "f1.csv", monkeypatch)
            == _reference_bytes(one, tmp_path / "r1.csv"))
    carriage = table.assign(note=["x\ry"] + ["ok"] * 6)  # quote every text cell
    assert (_fast_bytes(carriage, tmp_path / "f2.csv", monkeypatch)
            == _reference_bytes(carriage, tmp_path / "r2.csv"))
    assert b'"x\ry"' in (tmp_path / "f2.csv").read_bytes()


# ------------------------------------------------------------------------------ fallback

FALLBACK = {
    "categorical": pd.DataFrame({"c": pd.Categorical(["a", "b", "a"])}),
    "dates": pd.DataFrame({"d": pd.to_datetime(["2024-01-01", "2024-02-03", None])}),
    "objects holding numbers": pd.DataFrame({"o": np.array(["a", 1, 2.5], dtype=object)}),
    "label not text": pd.DataFrame({0: [1.0, 2.0, 3.0]}),
    "complex": pd.DataFrame({"z": np.array([1 + 2j, 0j, -1j])}),
    "no columns": pd.DataFrame(index=range(3)),
}


@pytest.mark.parametrize("case", list(FALLBACK))
def test_what_the_fast_path_leaves_to_pandas_is_named_and_still_pandas_bytes(case, tmp_path,
                                                                            monkeypatch):
    table = FALLBACK[case]
    assert fast_csv.why_not(atomic.safe_for_spreadsheets(table), csv.QUOTE_MINIMAL)
    monkeypatch.setattr(atomic, "FAST_CSV_MIN_ROWS", 0)
    atomic.write_csv(tmp_path / "out.csv", table)
    # reference: pandas' to_csv of the same frame
    assert (tmp_path / "out.csv").read_bytes() == _reference_bytes(table, tmp_path / "r.csv")


def test_short_tables_keep_pandas():
    table = pd.DataFrame({"x": np.arange(10.0)})
    writer = atomic.csv_writer(table, csv.QUOTE_MINIMAL)
    assert not isinstance(getattr(writer, "__self__", None), fast_csv.Plan)


# ----------------------------------------------------------------------- big and real tables


@pytest.mark.slow  # builds a 1,000,000-row table (about 1 s)
def test_a_million_row_estimates_table_takes_the_fast_path():
    table = estimates_like(1_000_000, np.random.default_rng(3))
    safe = atomic.safe_for_spreadsheets(table)
    assert fast_csv.why_not(safe, csv.QUOTE_MINIMAL) is None
    writer = atomic.csv_writer(safe, csv.QUOTE_MINIMAL)
    assert isinstance(getattr(writer, "__self__", None), fast_csv.Plan)


@pytest.mark.slow  # pandas writes 200,000 rows in several seconds (the timings: benchmarks/)
def test_a_large_table_is_pandas_bytes(tmp_path):
    # reference: pandas' to_csv of the same frame (no text cell needs a guard here); the
    # timings of a million rows are printed by benchmarks/bench_psis_csv.py
    table = estimates_like(200_000, np.random.default_rng(4))
    table.to_csv(tmp_path / "old.csv", index=False, float_format="%.10g")
    atomic.write_csv(tmp_path / "new.csv", table)
    assert (tmp_path / "new.csv").read_bytes() == (tmp_path / "old.csv").read_bytes()


@pytest.mark.slow  # one small fit of the demo data (a few seconds)
def test_every_csv_of_a_demo_fit_is_pandas_bytes(tmp_path, monkeypatch):
    monkeypatch.setattr(atomic, "FAST_CSV_MIN_ROWS", 0)
    written = []
    real_write_csv = atomic.write_csv

    def spy(path, table):
        real_write_csv(path, table)
        written.append((Path(path).name, Path(path).read_bytes(), table.copy()))
        safe = atomic.safe_for_spreadsheets(table)
        quoting = (csv.QUOTE_NONNUMERIC if atomic._has_carriage_return(safe)
                   else csv.QUOTE_MINIMAL)
        assert fast_csv.why_not(safe, quoting) is None, Path(path).name

    monkeypatch.setattr(atomic, "write_csv", spy)
    api.fit(str(api.demo_data_path()), group="branch", successes="signups",
            trials="visitors", seed=3, out=str(tmp_path / "run"))
    names = {name for name, _, _ in written}
    assert {"estimates.csv", "ranks.csv", "funnel.csv", "group_checks.csv"} <= names
    for name, got, table in written:
        # reference: pandas' to_csv of the same frame the run folder was given
        assert got == _reference_bytes(table, tmp_path / "reference.csv"), name


def test_text_utf8_cannot_encode_is_left_to_pandas(tmp_path):
    table = pd.DataFrame({"t": pd.Series(["ok", "lone \ud800 surrogate"], dtype=object)})
    assert "cannot hold" in fast_csv.why_not(table, csv.QUOTE_MINIMAL)
    with pytest.raises(UnicodeEncodeError):  # pandas' own writer refuses it too, as before
        atomic.write_csv(tmp_path / "out.csv", table)
