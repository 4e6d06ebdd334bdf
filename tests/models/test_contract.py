"""One contract for every estimator and engine (scikit-learn style)."""

from __future__ import annotations

import numpy as np
import pytest
from workbench.models import (
    SUMMARY_COLUMNS,
    BetaBinomial,
    CompletePooling,
    GroupCounts,
    LogitNormal,
    NoPooling,
    NotFittedError,
    ParameterError,
)

CASES = [
    (NoPooling, "exact"),
    (CompletePooling, "exact"),
    (BetaBinomial, "exact"),
    pytest.param(BetaBinomial, "mcmc", marks=pytest.mark.slow),
    pytest.param(LogitNormal, "mcmc", marks=pytest.mark.slow),
]


@pytest.mark.parametrize(("cls", "engine"), CASES)
def test_fit_returns_self_and_shared_columns(cls, engine, small_counts):
    m = cls(engine=engine, draws=300, chains=2, random_seed=1)
    assert not [k for k in vars(m) if k.endswith("_")]
    with pytest.raises(NotFittedError):
        m.summary()
    assert m.fit(small_counts) is m
    table = m.summary(target=0.2)
    assert list(table.columns) == SUMMARY_COLUMNS + ["prob_above_target"]
    assert len(table) == small_counts.n_groups
    post = m.idata_.posterior
    assert post["theta"].dims == ("chain", "draw", "group")
    assert list(post["group"].values) == list(small_counts.names)
    assert post.attrs["model"] == cls.name
    assert post.attrs["engine"] == engine
    assert "theta_new" in post
    assert "log_likelihood" in m.idata_.groups()
    np.testing.assert_array_equal(m.idata_.observed_data["successes"], small_counts.successes)
    np.testing.assert_array_equal(m.idata_.constant_data["trials"], small_counts.trials)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"engine": "nuts"}, "engine='nuts' is not one of 'auto', 'exact', 'mcmc'"),
        ({"draws": 0}, "draws=0"),
        ({"chains": 1.5}, "chains=1.5"),
        ({"random_seed": -1}, "random_seed=-1"),
        ({"kappa_prior": (0, 3)}, "kappa_prior"),
        ({"target_accept": 1.2}, "target_accept=1.2"),
    ],
)
def test_bad_settings_raise_parameter_error(kwargs, match, small_counts):
    with pytest.raises(ParameterError, match=match):
        BetaBinomial(**kwargs).fit(small_counts)


def test_no_pooling_has_no_mcmc_engine(small_counts):
    with pytest.raises(ParameterError, match="engine='mcmc' is not one of 'auto', 'exact'"):
        NoPooling(engine="mcmc").fit(small_counts)


def test_bad_level_and_target(small_counts):
    m = NoPooling(random_seed=0).fit(small_counts)
    with pytest.raises(ParameterError, match="level=1.5"):
        m.summary(level=1.5)
    with pytest.raises(ParameterError, match="target=0"):
        m.summary(target=0)


def test_group_counts_validation():
    from workbench.models import DataError

    with pytest.raises(DataError, match="group 'b': successes=5 exceeds trials=4"):
        GroupCounts(["a", "b"], [1, 5], [2, 4])
    with pytest.raises(DataError, match="appears more than once"):
        GroupCounts(["a", "a"], [1, 1], [2, 4])
    with pytest.raises(DataError, match="negative"):
        GroupCounts(["a"], [-1], [2])
    with pytest.raises(DataError, match="not a whole number"):
        GroupCounts(["a"], [1.5], [2])
    with pytest.raises(DataError, match="no groups"):
        GroupCounts([], [], [])
