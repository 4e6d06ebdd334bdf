"""Target flags with a bounded expected share of false flags (Bayesian false discovery rate).

With a target rate, ``prob_above_target`` is the posterior probability that a group's rate
exceeds it (closed form where the engine is exact) and ``prob_below_target`` its complement.
A group is flagged on one side when it belongs to the largest set, taken in order of
decreasing probability, whose posterior expected share of false flags (the mean of 1 - P over
the flagged) stays at or below ``fdr``. Only groups with P > 1/2 are eligible, so no group is
flagged both ways (Newton et al. 2004; Mueller et al. 2004; cited from memory).

A flag says the side and what it means under ``better``: with ``better="higher"`` a group
above the target is better than it, with ``better="lower"`` worse, so the words (and the
report's colours, which follow the words) never mean good in one run and bad in the next.
Groups with no trials have no data of their own and are never flagged.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..cautions import RANKING_CAUTION as CAUTION


def fdr_flags(prob: np.ndarray, level: float) -> tuple[np.ndarray, float]:
    """Flag the largest set, by decreasing ``prob``, whose mean of (1 - prob) is <= ``level``.

    Only entries with prob > 1/2 are eligible. Returns the mask and the expected share of
    false flags among the flagged (0 when nothing is flagged).
    """
    prob = np.asarray(prob, dtype=float)
    order = np.argsort(-prob, kind="stable")
    ordered = prob[order]
    eligible = ordered > 0.5
    miss = np.cumsum(1.0 - ordered) / np.arange(1, len(prob) + 1)
    # miss is non-decreasing along the order, so the admissible prefix is contiguous
    ok = eligible & (miss <= level + 1e-12)
    m = int(np.argmin(ok)) if not ok.all() else len(ok)
    mask = np.zeros(len(prob), dtype=bool)
    mask[order[:m]] = True
    return mask, float(miss[m - 1]) if m else 0.0


def flag_words(better: str = "higher") -> dict[str, str]:
    """The target_flag value of each side: the side and, in brackets, better or worse."""
    good, bad = ("above", "below") if better == "higher" else ("below", "above")
    return {good: f"{good} target (better)", bad: f"{bad} target (worse)"}


def target_tables(
    names: np.ndarray, prob_above: np.ndarray, target: float, fdr: float,
    *, better: str = "higher", trials: np.ndarray | None = None,
) -> tuple[pd.DataFrame, dict]:
    """Per-group target columns and the targets.json document.

    ``trials``, where given, keeps the groups with none out of the flags (no data).
    """
    prob_above = np.clip(np.asarray(prob_above, dtype=float), 0.0, 1.0)
    prob_below = 1.0 - prob_above
    has_data = np.ones(len(prob_above), dtype=bool) if trials is None else np.asarray(trials) > 0
    above = np.zeros(len(prob_above), dtype=bool)
    below = above.copy()
    above[has_data], share_above = fdr_flags(prob_above[has_data], fdr)
    below[has_data], share_below = fdr_flags(prob_below[has_data], fdr)
    words = flag_words(better)
    flag = np.where(above, words["above"], np.where(below, words["below"], ""))
    table = pd.DataFrame(
        {
            "group": np.asarray(names).astype(str),
            "prob_above_target": prob_above,
            "prob_below_target": prob_below,
            "target_flag": flag,
        }
    )

    def side(mask, share):
        n = int(mask.sum())
        return {
            "flagged": n,
            "expected_false_share": share,
            "expected_false_flags": share * n,
        }

    doc = {
        "target": target,
        "fdr_level": fdr,
        "groups": int(len(names)),
        "above": side(above, share_above),
        "below": side(below, share_below),
        "better": better,
        "flag_words": words,
        "not_flagged_no_data": int((~has_data).sum()),
        "rule": (
            "flag the largest set of groups, in order of decreasing posterior probability of"
            " being above (below) the target, whose posterior expected share of false flags,"
            " the mean of 1 - P over the flagged, is at most fdr_level; only groups with"
            " P > 0.5 are eligible (Bayesian false discovery rate)."
        ),
        "caution": CAUTION,
    }
    return table, doc
