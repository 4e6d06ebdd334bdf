"""The verdict covers convergence, draws and the model checks: through the command line.

``main([...])`` returns the exit code. A clean run ends ``(final)``, verdict ``ready``, exit 0;
a run whose checks find a misfit ends differently, verdict ``misfit``, exit 3; a run with too
few draws is ``not-ready`` (exit 3) even on the exact engine. Data are simulated here; the
complete-pooling model (conjugate, exact) keeps the fits fast.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from workbench.analysis.diagnostics import (
    MISFIT,
    NOT_READY,
    READY,
    Diagnostics,
    include_checks,
)
from workbench.cli import main
from workbench.io.runfolder import path_of


def _write(path, successes, trials):
    names = [f"site-{i:02d}" for i in range(len(trials))]
    pd.DataFrame({"group": names, "successes": successes, "trials": trials}).to_csv(
        path, index=False)
    return str(path)


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    base = tmp_path_factory.mktemp("verdict")
    rng = np.random.default_rng(21)
    n = rng.integers(60, 240, 30)
    same = _write(base / "same.csv", rng.binomial(n, 0.3), n)  # one shared rate: the model holds
    rate = np.where(np.arange(30) % 2 == 0, 0.12, 0.48)  # two clusters: a shared rate cannot
    split = _write(base / "split.csv", rng.binomial(n, rate), n)
    return base, same, split


def _run(capsys, argv):
    code = main(argv)
    out = capsys.readouterr().out.strip().splitlines()
    return code, out


def _docs(folder):
    diag = json.loads(path_of(folder, "diagnostics").read_text())
    record = json.loads(path_of(folder, "record").read_text())
    return diag, record


def test_clean_run_is_final_and_misfit_run_is_not(files, capsys):
    base, same, split = files
    common = ["--model", "complete-pooling", "--seed", "3"]
    code_ok, out_ok = _run(capsys, ["fit", same, "--out", str(base / "ok"), *common])
    code_bad, out_bad = _run(capsys, ["fit", split, "--out", str(base / "bad"), *common])
    diag_ok, rec_ok = _docs(base / "ok")
    diag_bad, rec_bad = _docs(base / "bad")

    assert code_ok == 0 and out_ok[-1].endswith("(final)")
    assert diag_ok["verdict"] == READY and rec_ok["final"] is True
    assert "verdict: READY" in "\n".join(out_ok)

    assert code_bad == 3
    assert out_bad[-1] != out_ok[-1].replace("ok", "bad")
    assert "NOT FINAL" in out_bad[-1] and "misfit" in out_bad[-1]
    assert diag_bad["verdict"] == MISFIT and rec_bad["final"] is False
    assert rec_bad["verdict"] == MISFIT
    assert any(r["quantity"] == "model checks" for r in diag_bad["reasons"])
    assert "verdict: MISFIT" in "\n".join(out_bad)
    assert path_of(base / "bad", "not_final").exists()
    assert not path_of(base / "ok", "not_final").exists()


def test_too_few_draws_is_not_ready_on_an_exact_engine(files, capsys):
    base, same, _ = files
    code, out = _run(capsys, ["fit", same, "--out", str(base / "few"), "--model",
                              "complete-pooling", "--draws", "10", "--seed", "3"])
    diag, record = _docs(base / "few")
    text = "\n".join(out)
    assert code == 3
    assert diag["verdict"] == NOT_READY and record["final"] is False
    assert "READY (" not in text.replace("NOT-READY (", "")
    assert "40 independent draws" in text
    assert "NOT FINAL" in out[-1]


def _diag():
    return Diagnostics(table=pd.DataFrame({"r_hat": [1.0]}), run={}, verdict=READY)


def test_include_checks_states():
    d = include_checks(_diag(), {"verdict": "consistent", "replicated_draws": 1000,
                                 "statistics": [{}]})
    assert d.verdict == READY
    d = include_checks(_diag(), {"verdict": "misfit", "misfit_statistics": ["dispersion"],
                                 "replicated_draws": 1000, "statistics": [{}]})
    assert d.verdict == MISFIT and "dispersion" in d.reasons[-1]["text"]
    d = include_checks(_diag(), {"verdict": "consistent", "replicated_draws": 50,
                                 "statistics": [{}]})
    assert d.verdict == NOT_READY
    d = include_checks(_diag(), None)
    assert d.verdict == READY and any("not run" in n for n in d.notes)
    # a not-ready run stays not-ready when the checks also misfit
    base = _diag()
    base.verdict = NOT_READY
    d = include_checks(base, {"verdict": "misfit", "misfit_statistics": ["chi_square"],
                              "replicated_draws": 1000, "statistics": [{}]})
    assert d.verdict == NOT_READY and "chi_square" in d.reasons[-1]["text"]
