"""Target flags with a bounded expected share of false flags (Bayesian false discovery rate).

With a target rate, ``prob_above_target`` is the posterior probability that a group's rate
exceeds it (closed form where the engine is exact) and ``prob_below_target`` its complement.
A group is flagged on one side when it belongs to the largest set, taken in order of
decreasing probability, whose posterior expected share of false flags (the mean of 1 - P over
the flagged) stays at or below ``fdr``. Only groups with P > 1/2 are eligible, so no group is
flagged both ways (Newton et al. 2004; Mueller et al. 2004; cited from memory).
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


def target_tables(
    names: np.ndarray, prob_above: np.ndarray, target: float, fdr: float
) -> tuple[pd.DataFrame, dict]:
    """Per-group target columns and the targets.json document."""
    prob_above = np.clip(np.asarray(prob_above, dtype=float), 0.0, 1.0)
    prob_below = 1.0 - prob_above
    above, share_above = fdr_flags(prob_above, fdr)
    below, share_below = fdr_flags(prob_below, fdr)
    flag = np.where(above, "above target", np.where(below, "below target", ""))
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
        "rule": (
            "flag the largest set of groups, in order of decreasing posterior probability of"
            " being above (below) the target, whose posterior expected share of false flags,"
            " the mean of 1 - P over the flagged, is at most fdr_level; only groups with"
            " P > 0.5 are eligible (Bayesian false discovery rate)."
        ),
        "caution": CAUTION,
    }
    return table, doc
