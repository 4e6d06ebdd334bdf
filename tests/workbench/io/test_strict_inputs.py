"""Never miscount: the one strict count rule, named broken inputs, lines, roles, headers.

Each case here was a silent miscount or a wrong message before the strict rule (issue 13):
``1_0`` and other-script digits became 0 with exit 0, two ``trials`` columns used the first,
a NUL byte was dropped, ``(new group)`` collided with the predictions' own row, and line
numbers were wrong after quoted multi-line names.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from workbench.models import DataError

from workbench.cli.main import main
from workbench.io.inputs import MAX_COLUMNS, MAX_COUNT, load_groups, read_count

CORPUS_DIR = Path(__file__).resolve().parents[2] / "corpus" / "inputs"

#: file -> the message it must give (a regular expression)
CORPUS = {
    "underscore_digits.csv": r"row 1 \(line 2\) \(group 'odd'\): column 'successes' is '1_0'.*"
                             r"\(10\).*'trials' is '1_000'.*write it as 1000",
    "fullwidth_digits.csv": r"row 2 \(line 3\) \(group 'b'\): column 'successes' is '３',"
                            r" written with digits other than ASCII 0-9; write it as 3",
    "arabic_indic_digits.csv": r"row 1 \(line 2\).*'trials' is '١٠'.*write it as 10",
    "thousands_separator.csv": r"row 1 \(line 2\).*'trials' is '1,000', with a digit-group"
                               r" separator; write it as 1000",
    "exponent_count.csv": r"row 1 \(line 2\).*'trials' is '1e3'; write counts as plain digits,"
                          r" e.g. 1000",
    "signed_count.csv": r"'successes' is '\+1'; write counts as plain digits",
    "decimal_count.csv": r"'successes' is '1.5', not a whole number",
    "true_as_count.csv": r"'successes' has 'true' where a whole number is needed",
    "duplicate_column.csv": r"two columns named 'trials' \(columns 3 and 4\).*rename or remove",
    "duplicate_after_spaces.csv": r"two columns named 'trials' \(columns 3 and 4\)",
    "reserved_group_name.csv": r"row 2 \(line 3\): group '\(new group\)' is a name the tool"
                               r" uses for its own new-group row; rename the group",
    "multiline_names.csv": r"^row 3 \(line 7\) \(group 'bad'\): successes=9 exceeds trials=1",
    "nul_in_name.csv": r"line 2 holds a NUL byte.*remove it",
    "nul_in_header.csv": r"line 1 holds a NUL byte",
}


def test_corpus_is_complete():
    # every file of the corpus has its expected message, and every message its file
    assert {p.name for p in CORPUS_DIR.glob("*.csv")} == set(CORPUS)


@pytest.mark.parametrize("name", sorted(CORPUS))
def test_corpus_file_is_refused_with_row_column_value_and_fix(name):
    with pytest.raises(DataError, match=CORPUS[name]) as err:
        load_groups(CORPUS_DIR / name)
    assert "\n" not in str(err.value)


@pytest.mark.parametrize("name", sorted(CORPUS))
def test_corpus_file_through_the_cli_is_one_error_line_exit_2(name, tmp_path, capsys):
    code = main(["fit", str(CORPUS_DIR / name), "--out", str(tmp_path / "run")])
    err = capsys.readouterr().err
    assert code == 2
    assert err.startswith("error: ") and err.count("\n") == 1 and "Traceback" not in err
    assert not (tmp_path / "run").exists()


@pytest.mark.parametrize(
    ("cell", "count"),
    [("0", 0), ("7", 7), ("007", 7), ("12.0", 12), ("12.00", 12), (" 3 ", 3), (5, 5),
     (np.int64(9), 9), (4.0, 4), (np.float32(2.0), 2), (str(MAX_COUNT), MAX_COUNT)],
)
def test_read_count_accepts_ascii_digits_and_whole_numbers(cell, count):
    assert read_count(cell) == (count, None)


@pytest.mark.parametrize(
    "cell",
    ["1_0", "１０", "١٠", "۱۰", "१०", "1e3", "+1", "-1", "0x10", "1,000", "1 000", "1.5", "1.",
     ".0", "inf", "nan", "", "true", True, False, None, float("nan"), -1, 2.5, float("inf"),
     str(MAX_COUNT + 1), "9" * 40, MAX_COUNT + 1, "1\u00a0", "٣.0"],
)
def test_read_count_refuses_everything_else(cell):
    number, why = read_count(cell)
    assert number is None and why


def test_dataframe_object_column_with_mixed_cells_uses_the_same_rule():
    frame = pd.DataFrame({"group": ["a", "b", "c"], "successes": [1, "2", "1_0"],
                          "trials": [5, 5.0, "10"]}, dtype=object)
    with pytest.raises(DataError, match=r"^row 3 \(group 'c'\): column 'successes' is '1_0'"):
        load_groups(frame)
    frame.loc[2, "successes"] = "3"
    c = load_groups(frame).counts
    assert c.successes.tolist() == [1, 2, 3] and c.trials.tolist() == [5, 5, 10]


def test_boolean_count_column_is_refused():
    frame = pd.DataFrame({"group": ["a"], "successes": [True], "trials": [3]})
    with pytest.raises(DataError, match="true/false value where a whole number is needed"):
        load_groups(frame)


def test_parquet_errors_speak_of_rows_not_lines(tmp_path):
    pytest.importorskip("pyarrow")
    path = tmp_path / "t.parquet"
    pd.DataFrame({"group": ["a", "b"], "successes": [1, 9], "trials": [5, 3]}).to_parquet(path)
    with pytest.raises(DataError, match=r"^row 2 \(group 'b'\)") as err:
        load_groups(path)
    assert "line" not in str(err.value)


def test_parquet_nul_and_reserved_names_are_refused(tmp_path):
    pytest.importorskip("pyarrow")
    path = tmp_path / "t.parquet"
    pd.DataFrame({"group": ["a\x00b", "(new group)"], "successes": [1, 1],
                  "trials": [5, 3]}).to_parquet(path)
    with pytest.raises(DataError, match=r"row 1: column 'group' is 'a\\x00b', with a NUL"
                                        r".*row 2: group '\(new group\)'"):
        load_groups(path)


def test_dataframe_duplicate_columns_are_refused():
    frame = pd.DataFrame([["a", 1, 5, 9]], columns=["group", "successes", "trials", "trials"])
    with pytest.raises(DataError, match="two columns named 'trials'"):
        load_groups(frame)


@pytest.mark.parametrize(
    ("roles", "match"),
    [({"successes": "trials", "trials": "trials"}, "'trials' is given as both successes and"
                                                   " trials"),
     ({"group": "trials"}, "'trials' is given as both group and trials"),
     ({"outcome": "group"}, "'group' is given as both group and outcome"),
     ({"parent": "group"}, "'group' is given as both group and parent"),
     ({"covariates": ["successes"]}, "'successes' is given as both successes and covariates")],
)
def test_one_column_for_two_roles_is_refused(tmp_path, roles, match):
    path = tmp_path / "t.csv"
    path.write_text("group,successes,trials\na,1,5\n")
    with pytest.raises(DataError, match=match):
        load_groups(path, **roles)


def test_cli_successes_and_trials_naming_one_column_exit_2(tmp_path, capsys):
    path = tmp_path / "t.csv"
    path.write_text("group,successes,trials\na,1,5\nb,2,5\n")
    code = main(["fit", str(path), "--successes", "trials", "--trials", "trials",
                 "--out", str(tmp_path / "run")])
    err = capsys.readouterr().err
    assert code == 2 and "both name column 'trials'" in err and "Traceback" not in err
    assert not (tmp_path / "run").exists()


def test_two_million_column_header_is_refused_before_parsing(tmp_path):
    # the header alone is 4 MB; pandas took over 10 minutes on it
    path = tmp_path / "wide.csv"
    path.write_text(",".join(f"c{j}" for j in range(2_000_000)) + "\n" + "1," * 5 + "1\n")
    with pytest.raises(DataError, match=f"has 2,000,000 columns, more than the {MAX_COLUMNS:,}"):
        load_groups(path)


def test_multiline_quoted_names_keep_their_text_and_counts(tmp_path):
    text = (CORPUS_DIR / "multiline_names.csv").read_text(encoding="utf-8")
    path = tmp_path / "ok.csv"
    path.write_text(text.replace("bad,9,1", "fine,1,9"), encoding="utf-8")
    c = load_groups(path).counts
    assert c.names.tolist() == ["north\nsite", "south\n\nend", "fine"]
    assert c.successes.tolist() == [1, 2, 1] and c.trials.tolist() == [5, 4, 9]


def test_line_numbers_skip_blank_lines_like_the_reader(tmp_path):
    path = tmp_path / "blank.csv"
    path.write_text("group,successes,trials\n\na,1,5\n\n\nb,9,1\n")
    with pytest.raises(DataError, match=r"^row 2 \(line 6\) \(group 'b'\)"):
        load_groups(path)
