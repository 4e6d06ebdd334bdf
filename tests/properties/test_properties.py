"""Property tests: the validator never fails in a foreign way; exact-engine invariants hold."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest

hypothesis = pytest.importorskip("hypothesis")
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402
from workbench.models import BetaBinomial, DataError, GroupCounts, NoPooling  # noqa: E402

from workbench.io.inputs import load_groups  # noqa: E402

cell = st.one_of(
    st.integers(-5, 50).map(str),
    st.floats(allow_nan=True, allow_infinity=True).map(str),
    st.sampled_from(["", " ", "abc", "1e3", "3.0", "-0", "None", "NaN", "1,5", "٣"]),
    st.text(max_size=4),
)


@pytest.mark.slow
@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.tuples(st.text(max_size=5), cell, cell), min_size=0, max_size=12))
def test_any_table_loads_or_raises_data_error(rows):
    # the validator's contract: a random table is either usable or a one-line DataError
    frame = pd.DataFrame(rows, columns=["group", "successes", "trials"], dtype=object)
    try:
        loaded = load_groups(frame)
    except DataError as exc:
        assert "\n" not in str(exc)
        return
    c = loaded.counts
    assert (c.successes >= 0).all() and (c.successes <= c.trials).all()
    # nothing dropped or changed: the totals equal the cells read by an independent parser
    # (ASCII digits with an optional ".0", the only way a count may be written)
    plain = re.compile(r"^\s*([0-9]+)(\.0*)?\s*$")
    values = [[plain.match(str(v)) for v in frame[col]] for col in ("successes", "trials")]
    assert all(m is not None for col in values for m in col)
    assert int(c.successes.sum()) == sum(int(m.group(1)) for m in values[0])
    assert int(c.trials.sum()) == sum(int(m.group(1)) for m in values[1])


@settings(max_examples=150, deadline=None)
@given(st.lists(st.text(max_size=6), max_size=8), st.lists(st.text(max_size=6), max_size=8))
def test_outcome_layout_loads_or_raises_data_error(labels, outcomes):
    k = min(len(labels), len(outcomes))
    frame = pd.DataFrame({"g": labels[:k], "o": outcomes[:k]})
    try:
        loaded = load_groups(frame, group="g", outcome="o")
    except DataError as exc:
        assert "\n" not in str(exc)
        return
    assert loaded.counts.trials.sum() == k


counts_strategy = st.integers(1, 12).flatmap(
    lambda g: st.tuples(
        st.lists(st.integers(0, 200), min_size=g, max_size=g),
        st.lists(st.floats(0, 1), min_size=g, max_size=g),
    )
)


def _counts(spec):
    trials, share = spec
    n = np.array(trials)
    y = np.floor(np.array(share) * n).astype(int)
    return GroupCounts([f"g{i}" for i in range(len(n))], y, n)


@pytest.mark.slow
@settings(max_examples=25, deadline=None)
@given(counts_strategy)
def test_exact_engine_invariants(spec):
    counts = _counts(spec)
    m = BetaBinomial(draws=50, chains=2, random_seed=0).fit(counts)
    t = m.summary()
    assert ((0 <= t["lower"]) & (t["lower"] <= t["posterior_median"] + 1e-12)).all()
    assert ((t["posterior_median"] <= t["upper"] + 1e-12) & (t["upper"] <= 1)).all()
    # each posterior mean lies between its raw rate and the population mean (trials > 0),
    # to the spread of the population mean itself
    mu = m.idata_.posterior["mu"].values.ravel()
    lo_mu, hi_mu = np.quantile(mu, [0.0, 1.0])
    seen = t["trials"] > 0
    raw = t.loc[seen, "observed_rate"]
    est = t.loc[seen, "posterior_mean"]
    assert (est >= np.minimum(raw, lo_mu) - 1e-9).all()
    assert (est <= np.maximum(raw, hi_mu) + 1e-9).all()


@pytest.mark.slow
@settings(max_examples=20, deadline=None)
@given(counts_strategy, st.randoms(use_true_random=False))
def test_relabelling_groups_only_reorders_rows(spec, rnd):
    counts = _counts(spec)
    order = list(range(counts.n_groups))
    rnd.shuffle(order)
    shuffled = GroupCounts(counts.names[order], counts.successes[order], counts.trials[order])
    for cls in (NoPooling, BetaBinomial):
        a = cls(draws=20, chains=1, random_seed=0).fit(counts).summary().set_index("group")
        b = cls(draws=20, chains=1, random_seed=0).fit(shuffled).summary().set_index("group")
        cols = ["posterior_mean", "posterior_median", "lower", "upper", "shrinkage"]
        pd.testing.assert_frame_equal(a.loc[b.index, cols], b[cols], rtol=1e-9, atol=1e-12)
