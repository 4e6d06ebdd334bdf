"""Refuse early: options and sizes are checked before any work (issue 13).

Before, --draws 100000000 ran 66 s to 9.7 GB before a traceback; --chains 100000, --seed
99999999999999999999 and --kappa-prior 1e308 1e308 failed after the work; --mu-prior 1e308 1
ended in numpy's 'b <= 0' traceback. Each is now one error line, exit 2, nothing fitted.
"""

from __future__ import annotations

import pytest
from helpers import recorded_exit_code

from workbench import pipeline
from workbench.cli.main import main


@pytest.fixture
def data(tmp_path):
    path = tmp_path / "d.csv"
    path.write_text("group,successes,trials\n" + "".join(f"g{i},{i},{i + 5}\n"
                                                          for i in range(30)))
    return path


@pytest.fixture
def no_fit(monkeypatch):
    def refuse(*a, **k):
        raise AssertionError("the fit started before the options were checked")
    monkeypatch.setattr(pipeline, "fit_model", refuse)


@pytest.mark.parametrize(
    ("args", "match"),
    [(["--draws", "100000000"], "--draws 100000000: must be a whole number in"),
     (["--draws", "1000000", "--chains", "64"], r"30 groups would hold 15.4 GB of draws, more"
                                                r" than the 4 GB allowed; give --draws 2604"),
     (["--chains", "100000"], "--chains 100000: must be a whole number in"),
     (["--seed", "99999999999999999999"], "--seed 99999999999999999999: must be"),
     (["--seed", "-1"], "--seed -1: must be"),
     (["--kappa-prior", "1e308", "1e308"], "--kappa-prior 1e308: must be"),
     (["--mu-prior", "1e308", "1"], "--mu-prior 1e308: must be a number in"),
     (["--beta-prior", "1e308", "1e308", "--model", "no-pooling"], "--beta-prior 1e308"),
     (["--beta-prior", "0", "1", "--model", "no-pooling"], "--beta-prior 0: must be"),
     (["--mu-prior", "inf", "1"], "--mu-prior inf: must be"),
     (["--mu-prior", "nan", "1"], "--mu-prior nan: must be")],
)
def test_refused_before_any_work(data, tmp_path, capsys, no_fit, args, match):
    code = main(["fit", str(data), "--out", str(tmp_path / "run"), *args])
    err = capsys.readouterr().err
    assert code == 2 and err.startswith("error: ") and err.count("\n") == 1, err
    assert match.replace("\\", "") in err or __import__("re").search(match, err), err
    assert not (tmp_path / "run").exists()


def test_size_limit_names_draws_that_fit(data, tmp_path, capsys, monkeypatch):
    # the suggested --draws must itself pass the check (and the fit then proceeds)
    started = []
    monkeypatch.setattr(pipeline, "fit_model", lambda *a, **k: started.append(1) or 1 / 0)
    main(["fit", str(data), "--draws", "1000000", "--chains", "64", "--out",
          str(tmp_path / "run")])
    err = capsys.readouterr().err
    suggested = int(err.split("give --draws ")[1].split()[0])
    with pytest.raises(ZeroDivisionError):
        main(["fit", str(data), "--draws", str(suggested), "--chains", "64", "--out",
              str(tmp_path / "run")])
    assert started == [1]


@pytest.mark.slow
def test_tab_in_a_group_name_prints_no_font_warning(tmp_path, capsys):
    path = tmp_path / "d.csv"
    path.write_text('group,successes,trials\n"tab\there",3,10\nplain,4,12\nthird,1,9\n')
    code = main(["fit", str(path), "--model", "no-pooling", "--seed", "1", "--replicates",
                 "50", "--report", "--out", str(tmp_path / "run")])
    err = capsys.readouterr().err
    assert code == recorded_exit_code(tmp_path / "run")
    assert "Glyph" not in err and "missing from" not in err and "Warning" not in err, err
    assert (tmp_path / "run" / "report.html").exists()
