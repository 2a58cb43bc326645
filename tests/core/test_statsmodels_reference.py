"""The core against statsmodels estimates on the datasets statsmodels ships (offline)."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.discrete.conditional_models import ConditionalLogit

from service.choice import Batch, score
from tests.core.conftest import model_from

MODES = ("air", "train", "bus", "car")  # statsmodels' modechoice codes 1..4


def fit_quietly(model, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return model.fit(disp=False, **kw)


def test_log_likelihood_at_conditional_logit_estimates_equals_its_llf():
    data = sm.datasets.modechoice.load_pandas().data
    attrs = ["ttme", "invc", "invt"]
    exog = data[attrs].copy()
    for code, mode in enumerate(MODES[:3], start=1):
        exog[f"asc_{mode}"] = (data["mode"] == code).astype(float)
    res = fit_quietly(ConditionalLogit(data["choice"], exog, groups=data["individual"]))
    params = dict(zip(exog.columns, res.params, strict=True))

    spec = {
        "name": "travel",
        "family": "multinomial",
        "alternatives": [{"id": m} for m in MODES],
        "attributes": [{"name": a} for a in attrs],
        "utilities": {
            m: [{"coefficient": a, "attribute": a} for a in attrs]
            + ([{"coefficient": f"asc_{m}"}] if m != "car" else [])
            for m in MODES
        },
    }
    model = model_from(spec, params)
    n = data["individual"].nunique()
    x = data[attrs].to_numpy().reshape(n, 4, 3)
    chosen = data["choice"].to_numpy().reshape(n, 4).argmax(axis=1)
    batch = Batch(x, np.zeros((n, 0)), np.ones((n, 4), bool), np.ones(n))
    p = score(model, batch).probabilities
    # Source: statsmodels ConditionalLogit (grouped by individual) on its bundled
    # modechoice data: our log-likelihood sum_n ln P_n(chosen) at its estimates is its llf.
    assert np.log(p[np.arange(n), chosen]).sum() == pytest.approx(res.llf, rel=1e-9)


def test_binary_probabilities_equal_statsmodels_logit_predict():
    data = sm.datasets.spector.load_pandas()
    exog = sm.add_constant(data.exog, prepend=False)
    res = fit_quietly(sm.Logit(data.endog, exog))
    names = list(data.exog.columns)
    spec = {
        "name": "grade",
        "family": "binary",
        "alternatives": [{"id": "improved"}, {"id": "not_improved"}],
        "context": [{"name": c} for c in names],
        "utilities": {
            "improved": [{"coefficient": "const"}]
            + [{"coefficient": c, "context": c} for c in names],
            "not_improved": [],
        },
    }
    model = model_from(spec, dict(zip(exog.columns, res.params, strict=True)))
    n = len(exog)
    z = data.exog.to_numpy(dtype=float)
    batch = Batch(np.zeros((n, 2, 0)), z, np.ones((n, 2), bool), np.ones(n))
    # Source: statsmodels Logit.predict on its bundled spector data.
    np.testing.assert_allclose(
        score(model, batch).probabilities[:, 0], res.predict(exog), rtol=1e-12
    )


def test_multinomial_probabilities_equal_statsmodels_mnlogit_predict():
    data = sm.datasets.anes96.load_pandas()
    exog = sm.add_constant(data.exog, prepend=False)
    res = fit_quietly(sm.MNLogit(data.endog, exog), maxiter=200)
    names = list(data.exog.columns)
    alts = [f"party_{k}" for k in range(7)]  # category 0 is the base
    spec = {
        "name": "party",
        "family": "multinomial",
        "alternatives": [{"id": a} for a in alts],
        "context": [{"name": c} for c in names],
        "utilities": {
            a: (
                []
                if k == 0
                else [{"coefficient": f"const_{k}"}]
                + [{"coefficient": f"{c}_{k}", "context": c} for c in names]
            )
            for k, a in enumerate(alts)
        },
    }
    params = res.params  # rows: exog columns, columns: categories 1..6
    est = {}
    for col, k in enumerate(range(1, 7)):
        est[f"const_{k}"] = params.loc["const"].iloc[col]
        est.update({f"{c}_{k}": params.loc[c].iloc[col] for c in names})
    model = model_from(spec, est)
    n = len(exog)
    z = data.exog.to_numpy(dtype=float)
    batch = Batch(np.zeros((n, 7, 0)), z, np.ones((n, 7), bool), np.ones(n))
    # Source: statsmodels MNLogit.predict on its bundled anes96 data.
    np.testing.assert_allclose(score(model, batch).probabilities, res.predict(exog), rtol=1e-10)
