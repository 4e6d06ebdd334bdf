"""The verdict's remedies never repeat what the run already did (issue 12, item 4)."""

from __future__ import annotations

import json
import warnings

import numpy as np

with warnings.catch_warnings():
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az

from workbench.analysis.diagnostics import (
    Diagnostics,
    Thresholds,
    after_retry,
    first_remedy_settings,
    remedies_for,
)


def _idata(**attrs):
    rng = np.random.default_rng(0)
    idata = az.from_dict(posterior={"alpha": rng.normal(size=(2, 50))})
    idata.posterior.attrs.update({k: json.dumps(v) if isinstance(v, dict) else v
                                  for k, v in attrs.items()})
    return idata


def _reason(check):
    return {"quantity": "sampler", "check": check, "value": 3, "threshold": 0, "by": 3,
            "text": f"sampler: {check}"}


def _diagnostics(reasons, idata):
    return Diagnostics(None, {}, "not-ready", reasons, remedies_for(reasons, idata), [],
                       Thresholds())


def test_divergences_at_default_acceptance_suggest_smaller_steps_first():
    idata = _idata(model="logit-normal", engine="mcmc", target_accept=0.9, tune=1000)
    out = remedies_for([_reason("divergences")], idata)
    assert out[0].startswith("raise the target acceptance (--target-accept 0.99)")
    new, said = first_remedy_settings(_diagnostics([_reason("divergences")], idata), {})
    assert new["target_accept"] == 0.99 and said == "retried with --target-accept 0.99"


def test_divergences_at_high_acceptance_suggest_a_change_of_model_or_data():
    # the nested model runs at 0.99 by default: suggesting 0.99 again would repeat the run
    idata = _idata(model="nested", engine="mcmc", target_accept=0.99, tune=1000)
    out = remedies_for([_reason("divergences")], idata)
    assert not any("--target-accept" in r for r in out), out
    assert out[0].startswith("change the model") and "--tau-prior" in out[0]
    assert any("separation" in r for r in out) and any("merge parents" in r for r in out)
    assert first_remedy_settings(_diagnostics([_reason("divergences")], idata), {}) is None


def test_after_a_retry_the_remedies_drop_what_was_applied_and_lead_with_the_model():
    idata = _idata(model="logit-normal", engine="latent", target_accept=0.9, tune=2000)
    for failing, applied in (("R-hat", "retried with --tune 2000 --draws 2000"),
                             ("divergences", "retried with --target-accept 0.99")):
        diag = after_retry(_diagnostics([_reason(failing)], idata), idata, applied)
        flags = applied.removeprefix("retried with ").split(" --")
        assert not any(f.strip("-") in r for r in diag.remedies for f in flags), diag.remedies
        assert diag.remedies[0].startswith("use the collapsed engine (--engine mcmc)")
        assert any(r.startswith("change the model") for r in diag.remedies)
        # no further sampler change is left to try automatically
        assert first_remedy_settings(diag, {}) is None
