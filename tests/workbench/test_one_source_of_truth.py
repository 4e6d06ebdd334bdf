"""Issue 9's promises, through the command line and the API as a user meets them.

Data: the bundled invented demo table (64 studio branches in regions).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from workbench import api
from workbench.cli import main
from workbench.io.runfolder import FILES

DEMO_COLUMNS = ["--group", "branch", "--successes", "signups", "--trials", "visitors"]


@pytest.fixture(scope="module")
def reported(tmp_path_factory, ):
    folder = tmp_path_factory.mktemp("runs") / "run"
    code = main(["fit", str(api.demo_data_path()), *DEMO_COLUMNS, "--target", "0.2",
                 "--seed", "3", "--report", "--out", str(folder)])
    assert code == 0
    return folder


@pytest.mark.slow
def test_rank_with_a_new_target_rewrites_the_report_and_records_the_step(reported):
    page = (reported / FILES["report"]).read_text(encoding="utf-8")
    assert "--target 0.2" in page and "--target 0.08" not in page
    assert main(["rank", str(reported), "--target", "0.08"]) == 0
    record = json.loads((reported / FILES["record"]).read_text())
    assert record["settings"]["target"] == 0.08
    assert [s["command"] for s in record["steps"]] == [f"workbench rank {reported} --target 0.08"]
    page = (reported / FILES["report"]).read_text(encoding="utf-8")
    assert "--target 0.08" in page  # the report is drawn at the new target ...
    assert f"workbench rank {reported} --target 0.08" in page  # ... and says how it was made
    targets = json.loads((reported / FILES["targets"]).read_text())
    assert targets["target"] == 0.08


def test_a_bad_number_is_one_error_line(tmp_path, capsys):
    code = main(["fit", str(api.demo_data_path()), *DEMO_COLUMNS, "--level", "1.5",
                 "--out", str(tmp_path / "run")])
    err = capsys.readouterr().err.splitlines()
    assert code == 2 and len(err) == 1
    assert err[0] == ("error: --level 1.5: must be a number in (0, 1); see 'workbench fit"
                      " --help'")
    assert not (tmp_path / "run").exists()


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    folder = tmp_path_factory.mktemp("runs") / "run"
    assert main(["fit", str(api.demo_data_path()), *DEMO_COLUMNS, "--seed", "3",
                 "--out", str(folder)]) == 0
    return folder


def test_the_same_bad_number_reads_the_same_in_every_command(fitted, capsys):
    assert main(["rank", str(fitted), "--level", "1.5"]) == 2
    err = capsys.readouterr().err.splitlines()
    assert err == ["error: --level 1.5: must be a number in (0, 1); see 'workbench rank --help'"]


@pytest.mark.slow  # a whole process or several fits: seconds (iterate with -m 'not slow')
def test_a_closed_pipe_ends_quietly_and_the_folder_is_complete(tmp_path):
    out = tmp_path / "run"
    command = (f"{sys.executable} -m workbench.cli fit {api.demo_data_path()}"
               f" {' '.join(DEMO_COLUMNS)} --seed 2 --target 0.2 --report --out {out} | head -1")
    done = subprocess.run(["bash", "-c", f"set -o pipefail; {command}"], capture_output=True,
                          text=True, timeout=600)
    assert "Traceback" not in done.stderr and done.stderr == ""
    assert done.stdout.startswith("data: 64 rows read")
    record = json.loads((out / FILES["record"]).read_text())
    assert set(record["files"]) == {p.name for p in out.iterdir()}
    assert (out / FILES["report"]).exists() and record["final"]


@pytest.mark.slow
def test_results_are_small_in_a_notebook():
    run = api.fit(api.demo_data_path(), group="branch", successes="signups",
                  trials="visitors", seed=1, checks=False)
    text = repr(run)
    assert len(text) < 1000 and "beta-binomial" in text and "ready" in text
    page = run._repr_html_()
    assert "READY" in page and "<table" in page
    assert "BetaBinomial(engine='auto'" in repr(run.model)
    # the estimates hold the rank columns estimates.csv has, and the follow-up methods work
    assert {"rank_median", "rank_lower", "rank_upper"} <= set(run.estimates.columns)
    wide = run.summary(level=0.99)
    assert (wide["upper"] - wide["lower"] > run.estimates["upper"] - run.estimates["lower"]).all()
    assert run.ranks(top=3)["prob_best_k"].sum() == pytest.approx(3)
    assert len(run.predict(trials=10)) == 65  # 64 branches and the new group


@pytest.mark.slow  # a whole process or several fits: seconds (iterate with -m 'not slow')
def test_a_users_models_py_does_not_shadow_the_model_layer(tmp_path):
    (tmp_path / "models.py").write_text("raise SystemExit('the user models.py was imported')\n")
    (tmp_path / "models").mkdir()
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    done = subprocess.run([sys.executable, "-c", "from workbench import api; print('ok')"],
                          cwd=tmp_path, capture_output=True, text=True, env=env, timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "ok"


@pytest.mark.slow
def test_compare_fits_a_parent_model_beside_one_without(tmp_path, capsys):
    out = tmp_path / "cmp"
    code = main(["compare", "--data", str(api.demo_data_path()), *DEMO_COLUMNS,
                 "--parent", "region", "--models", "nested,beta-binomial", "--seed", "1",
                 "--out", str(out)])
    nested = json.loads((out / "nested" / FILES["record"]).read_text())
    plain = json.loads((out / "beta-binomial" / FILES["record"]).read_text())
    # both fitted; compare exits 3 exactly when a fit did not converge (README exit codes)
    unconverged = [r for r in (nested, plain) if r["verdict"] == "not-ready"]
    assert code == (3 if unconverged else 0), capsys.readouterr().err
    assert nested["settings"]["parent"] == "region"
    assert plain["settings"]["parent"] is None  # not recorded for a model that never used it
    assert (out / "nested" / FILES["parents"]).exists()
    assert not (out / "beta-binomial" / FILES["parents"]).exists()


def test_compare_refuses_columns_no_model_uses(tmp_path, capsys):
    data = tmp_path / "d.csv"
    frame = pd.read_csv(api.demo_data_path())
    frame.assign(mix=range(len(frame))).to_csv(data, index=False)
    code = main(["compare", "--data", str(data), *DEMO_COLUMNS, "--covariates", "mix",
                 "--models", "beta-binomial,no-pooling", "--out", str(tmp_path / "c")])
    assert code == 2
    assert "covariates are used only by" in capsys.readouterr().err
    assert not (tmp_path / "c").exists()


def test_a_run_folder_reads_back_as_a_small_object(fitted):
    folder = api.open_run(fitted)
    assert len(repr(folder)) < 1000 and "RunFolder(" in repr(folder)
    assert "READY" in folder._repr_html_()
    assert Path(folder.path) == fitted


def test_a_missing_column_is_named_by_the_callers_spelling(tmp_path, capsys):
    # issue 9: messages speak the user's language (--group on the command line, group= in Python)
    code = main(["fit", str(api.demo_data_path()), "--out", str(tmp_path / "r")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1
    assert "--group COLUMN" in err[0] and "group=" not in err[0]
    with pytest.raises(Exception, match="group=COLUMN"):
        api.fit(api.demo_data_path())
