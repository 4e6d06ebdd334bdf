"""The command-line contract: commands, files, columns and exit codes 0 / 2 / 3."""

from __future__ import annotations

import json
import re

import pandas as pd
import pytest
from helpers import recorded_exit_code

from workbench.cli import main

ESTIMATE_COLUMNS = [
    "group",
    "successes",
    "trials",
    "observed_rate",
    "posterior_mean",
    "posterior_median",
    "lower",
    "upper",
]


def csv(tmp_path, rows, header="group,successes,trials"):
    path = tmp_path / "data.csv"
    path.write_text(header + "\n" + "\n".join(rows) + "\n", encoding="utf-8")
    return path


@pytest.mark.slow  # a whole process or several fits: seconds (iterate with -m 'not slow')
def test_demo_writes_the_run_folder(tmp_path, capsys):
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--seed", "3"]) == 0
    for name in ("estimates.csv", "posterior.nc", "run.json", "diagnostics.json"):
        assert (out / name).exists(), name
    est = pd.read_csv(out / "estimates.csv")
    assert list(est.columns[:8]) == ESTIMATE_COLUMNS
    assert "shrinkage" in est.columns
    record = json.loads((out / "run.json").read_text())
    assert record["input"]["rows_read"] == 64 and record["input"]["rows_used"] == 64
    assert record["random_seed"] == 3 and record["final"] is True
    assert "convergence: READY" in capsys.readouterr().out


def test_row_7_error_exits_2_and_writes_nothing(tmp_path, capsys):
    rows = [f"g{i},{i},{i + 5}" for i in range(1, 10)]
    rows[6] = "g7,99,12"
    out = tmp_path / "run"
    code = main(["fit", str(csv(tmp_path, rows)), "--out", str(out)])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and err.startswith("error: ") and "row 7" in err
    assert "Traceback" not in err
    assert not out.exists()
    assert [p.name for p in tmp_path.iterdir()] == ["data.csv"]


@pytest.mark.slow
def test_fit_every_model_and_target(tmp_path):
    path = csv(tmp_path, [f"g{i},{i},{3 * i + 4}" for i in range(12)])
    for model in ("beta-binomial", "no-pooling", "complete-pooling"):
        out = tmp_path / model
        assert (
            main(
                [
                    "fit",
                    str(path),
                    "--model",
                    model,
                    "--target",
                    "0.3",
                    "--out",
                    str(out),
                    "--seed",
                    "1",
                ]
            )
            == recorded_exit_code(out)
        )
        record = json.loads((out / "run.json").read_text())
        # these rates (i / (3 i + 4)) are more regular than binomial noise: one shared rate
        # misfits them, and so does the beta-binomial, whose kappa posterior runs to the cap
        # (nearly one shared rate); no pooling has a rate per group and fits
        assert record["verdict"] == ("ready" if model == "no-pooling" else "misfit"), model
        est = pd.read_csv(out / "estimates.csv")
        assert "prob_above_target" in est.columns
        assert est["prob_above_target"].between(0, 1).all()


def test_verify_reports_agreement_for_conjugate_model(tmp_path, capsys):
    path = csv(tmp_path, [f"g{i},{i},{3 * i + 4}" for i in range(12)])
    out = tmp_path / "run"
    assert main(["fit", str(path), "--model", "no-pooling", "--verify", "--out", str(out)]) == 0
    record = json.loads((out / "run.json").read_text())
    assert record["verification"]["share_within_4_mcse"] >= 0.9
    assert "verify:" in capsys.readouterr().out


def test_usage_errors_exit_2(tmp_path, capsys):
    path = csv(tmp_path, ["a,1,2"])
    assert main(["fit", str(path), "--level", "1.5"]) == 2
    assert main(["fit", str(path), "--model", "nope"]) == 2
    assert main(["fit", str(path), "--outcome", "x", "--trials", "t"]) == 2
    assert main(["fit", str(tmp_path / "missing.csv"), "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert "no such file" in err and "Traceback" not in err


def test_help_on_every_command(capsys):
    for argv in (["--help"], ["fit", "--help"], ["demo", "--help"]):
        assert main(argv) == 0
    text = capsys.readouterr().out
    for option in (
        "--group",
        "--successes",
        "--trials",
        "--outcome",
        "--model",
        "--engine",
        "--target",
        "--level",
        "--seed",
        "--out",
        "--verify",
        "--retry",
    ):
        assert option in text


@pytest.mark.slow
def test_existing_run_folder_replaced_whole_other_folders_refused(tmp_path, capsys):
    path = csv(tmp_path, [f"g{i},{i},{i + 5}" for i in range(6)])
    out = tmp_path / "run"
    assert main(["fit", str(path), "--out", str(out), "--seed", "1"]) == 0
    (out / "stale.txt").write_text("old")  # a file workbench did not write: never deleted
    assert main(["fit", str(path), "--out", str(out), "--seed", "2"]) == 2
    assert (out / "stale.txt").read_text() == "old"
    assert "did not write (stale.txt)" in capsys.readouterr().err
    (out / "stale.txt").unlink()
    assert main(["fit", str(path), "--out", str(out), "--seed", "2"]) == 0
    assert json.loads((out / "run.json").read_text())["random_seed"] == 2
    other = tmp_path / "mine"
    other.mkdir()
    (other / "notes.txt").write_text("keep me")
    assert main(["fit", str(path), "--out", str(other)]) == 2
    assert (other / "notes.txt").read_text() == "keep me"
    assert "not a run folder" in capsys.readouterr().err
    leftovers = [p.name for p in tmp_path.iterdir() if p.name.endswith((".part", ".old"))]
    assert leftovers == []


def test_interrupted_write_leaves_old_folder_intact(tmp_path, monkeypatch):

    path = csv(tmp_path, [f"g{i},{i},{i + 5}" for i in range(6)])
    out = tmp_path / "run"
    assert main(["fit", str(path), "--out", str(out), "--seed", "1"]) == 0
    before = (out / "estimates.csv").read_text()

    def boom(*args, **kwargs):
        raise KeyboardInterrupt

    import arviz

    monkeypatch.setattr(arviz.InferenceData, "to_netcdf", boom)
    assert main(["fit", str(path), "--out", str(out), "--seed", "2"]) == 130
    assert (out / "estimates.csv").read_text() == before
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


@pytest.mark.slow
def test_starved_mcmc_not_ready_exits_3_normal_run_ready(tmp_path, capsys):
    # a deliberately starved run must not be called final; a normal one of the same data is
    path = csv(tmp_path, [f"g{i},{i % 7},{12 + 3 * i}" for i in range(30)])
    starved = tmp_path / "starved"
    code = main(
        [
            "fit",
            str(path),
            "--engine",
            "mcmc",
            "--draws",
            "30",
            "--tune",
            "30",
            "--seed",
            "1",
            "--out",
            str(starved),
        ]
    )
    assert code == 3
    diag = json.loads((starved / "diagnostics.json").read_text())
    assert diag["verdict"] == "not-ready" and diag["reasons"] and diag["remedies"]
    assert json.loads((starved / "run.json").read_text())["final"] is False
    assert "NOT FINAL" in (starved / "NOT-FINAL.txt").read_text()
    assert "NOT FINAL" in capsys.readouterr().out
    normal = tmp_path / "normal"
    assert main(["fit", str(path), "--engine", "mcmc", "--seed", "1", "--out", str(normal)]) == 0
    assert json.loads((normal / "diagnostics.json").read_text())["verdict"] == "ready"
    assert not (normal / "NOT-FINAL.txt").exists()


@pytest.mark.slow
def test_exact_and_mcmc_runs_and_verify(tmp_path, capsys):
    path = csv(tmp_path, [f"g{i},{(i * 7) % 11},{15 + 4 * i}" for i in range(25)])
    for engine in ("exact", "mcmc"):
        out = tmp_path / engine
        assert (
            main(
                [
                    "fit",
                    str(path),
                    "--model",
                    "beta-binomial",
                    "--engine",
                    engine,
                    "--verify",
                    "--seed",
                    "4",
                    "--out",
                    str(out),
                ]
            )
            == 0
        )
        est = pd.read_csv(out / "estimates.csv")
        assert "shrinkage" in est.columns
        ver = json.loads((out / "run.json").read_text())["verification"]
        assert ver["share_within_4_mcse"] >= 0.96
    out = capsys.readouterr().out
    # each run's verify line ends "-> AGREE"; "DISAGREE" (which contains it) must not appear
    assert len(re.findall(r"-> AGREE$", out, flags=re.MULTILINE)) == 2
    assert "DISAGREE" not in out


@pytest.mark.slow
def test_retry_applies_first_remedy(tmp_path, capsys):
    path = csv(tmp_path, [f"g{i},{i % 7},{12 + 3 * i}" for i in range(30)])
    out = tmp_path / "retry"
    code = main(
        [
            "fit",
            str(path),
            "--engine",
            "mcmc",
            "--draws",
            "30",
            "--tune",
            "30",
            "--seed",
            "1",
            "--retry",
            "--out",
            str(out),
        ]
    )
    record = json.loads((out / "run.json").read_text())
    assert "retried with" in record["retry"]["applied"]
    assert code == (0 if record["final"] else 3)
    assert "not ready at first" in capsys.readouterr().out
