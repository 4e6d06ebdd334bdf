"""The data layer: every bad row named, nothing dropped silently."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from workbench.models import DataError

from workbench.io.inputs import load_groups


def write(tmp_path, text, name="data.csv"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def good_rows(k=8):
    return "\n".join(f"site-{i},{i},{10 + i}" for i in range(1, k + 1))


def test_reads_aggregated_csv(tmp_path):
    loaded = load_groups(write(tmp_path, "group,successes,trials\n" + good_rows()))
    assert loaded.counts.n_groups == 8
    rec = loaded.reconciliation
    assert (rec["rows_read"], rec["rows_used"], rec["groups"]) == (8, 8, 8)


def test_row_7_successes_exceed_trials_is_named(tmp_path):
    rows = good_rows().splitlines()
    rows[6] = "site-7,40,12"
    path = write(tmp_path, "group,successes,trials\n" + "\n".join(rows))
    with pytest.raises(DataError, match=r"row 7 .*group 'site-7'.*successes=40 exceeds trials=12"):
        load_groups(path)


def test_missing_column_lists_columns_found(tmp_path):
    path = write(tmp_path, "clinic,recovered,treated\na,1,2\n")
    with pytest.raises(
        DataError, match=r"no column 'group'.*found \['clinic', 'recovered', 'treated'\]"
    ):
        load_groups(path)
    loaded = load_groups(path, group="clinic", successes="recovered", trials="treated")
    assert loaded.counts.n_groups == 1


@pytest.mark.parametrize(
    ("value", "match"),
    [
        ("2.5", r"row 2 .*'successes' is '2.5', not a whole number"),
        ("-3", r"row 2 .*'successes' is '-3'; counts must be >= 0"),
        ("inf", r"row 2 .*'successes' is 'inf'; counts must be finite"),
        ("nan", r"row 2 .*'successes' is 'nan'; counts must be finite"),
        ("", r"row 2 .*'successes' has 'a blank'"),
        ("ten", r"row 2 .*'successes' has 'ten' where a whole number is needed"),
    ],
)
def test_bad_counts_named_by_row_column_value(tmp_path, value, match):
    path = write(tmp_path, f"group,successes,trials\na,1,5\nb,{value},5\n")
    with pytest.raises(DataError, match=match):
        load_groups(path)


def test_blank_label(tmp_path):
    with pytest.raises(DataError, match=r"row 2 .*column 'group' is blank"):
        load_groups(write(tmp_path, "group,successes,trials\na,1,5\n ,1,5\n"))


def test_up_to_five_problems_at_once(tmp_path):
    rows = "\n".join(f"g{i},9,1" for i in range(8))
    with pytest.raises(DataError) as err:
        load_groups(write(tmp_path, "group,successes,trials\n" + rows))
    message = str(err.value)
    assert message.count("exceeds") == 5
    assert "and 3 more problems" in message
    assert "\n" not in message


def test_empty_unreadable_and_headless_files(tmp_path):
    with pytest.raises(DataError, match="is empty"):
        load_groups(write(tmp_path, ""))
    with pytest.raises(DataError, match="no groups: .* has a header but no data rows"):
        load_groups(write(tmp_path, "group,successes,trials\n"))
    with pytest.raises(DataError, match="no such file"):
        load_groups(tmp_path / "missing.csv")
    bad = tmp_path / "broken.parquet"
    bad.write_bytes(b"not a parquet file at all")
    with pytest.raises(DataError, match="cannot read .*broken.parquet"):
        load_groups(bad)
    binary = tmp_path / "binary.csv"
    binary.write_bytes(b"\xff\xfe\x00\x81garbage")
    with pytest.raises(DataError, match="cannot read"):
        load_groups(binary)
    with pytest.raises(DataError, match="unknown file type"):
        load_groups(write(tmp_path, "x", name="data.xlsx"))


def test_repeated_groups_are_summed_and_said(tmp_path):
    path = write(tmp_path, "group,successes,trials\na,1,5\nb,2,4\na,3,5\n")
    loaded = load_groups(path)
    frame = loaded.counts.to_frame().set_index("group")
    assert frame.loc["a", "successes"] == 4 and frame.loc["a", "trials"] == 10
    assert loaded.reconciliation["groups_on_several_rows"] == 1
    assert any("summed" in note for note in loaded.notes)
    assert loaded.reconciliation["rows_used"] == 3


def test_zero_trial_group_kept_and_flagged(tmp_path):
    loaded = load_groups(write(tmp_path, "group,successes,trials\na,1,5\nnew,0,0\n"))
    assert "new" in list(loaded.counts.names)
    assert loaded.reconciliation["zero_trial_groups"] == ["new"]


def test_one_row_per_trial(tmp_path):
    text = "shop,fixed\na,yes\na,no\nb,TRUE\nb,1\nb,0\nc,false\n"
    loaded = load_groups(write(tmp_path, text), group="shop", outcome="fixed")
    frame = loaded.counts.to_frame().set_index("group")
    assert frame.loc["a"].tolist() == [1, 2]
    assert frame.loc["b"].tolist() == [2, 3]
    assert frame.loc["c"].tolist() == [0, 1]
    with pytest.raises(DataError, match=r"row 2 .*column 'fixed' has 'maybe'; outcomes must be"):
        load_groups(write(tmp_path, "shop,fixed\na,1\nb,maybe\n"), group="shop", outcome="fixed")


def test_parquet_and_dataframe(tmp_path):
    df = pd.DataFrame({"group": ["a", "b"], "successes": [1, 2], "trials": [3, 4]})
    df.to_parquet(tmp_path / "d.parquet")
    a = load_groups(tmp_path / "d.parquet").counts
    b = load_groups(df).counts
    np.testing.assert_array_equal(a.successes, b.successes)
    assert a.fingerprint() == b.fingerprint()
    df.loc[1, "trials"] = np.nan
    with pytest.raises(DataError, match="row 2 .*'trials'"):
        load_groups(df)
