"""Long-table codec: a missing column is named with the alternative that needs it, and the
fill of cells not given is the compiled model's (NaN where used, 0 elsewhere)."""

from __future__ import annotations

import io

import numpy as np
import pyarrow as pa
import pyarrow.csv as pcsv
import pytest
from store_cases import FERRY_SPEC, ferry_coefficients

from service.choice import compile_model, spec_from_dict
from service.codecs.long_table import batch_from_table


@pytest.fixture(scope="module")
def model():
    return compile_model(spec_from_dict(FERRY_SPEC), ferry_coefficients())


def test_a_missing_attribute_column_names_the_alternative_and_the_attribute(model):
    table = pcsv.read_csv(io.BytesIO(b"situation,alternative,fare,income\n1,fast_boat,3,50"))
    found = {(p.column, p.message) for p in batch_from_table(model, table)[2]}
    # both boats use log(minutes) (FERRY_SPEC); stay_home uses nothing
    assert ("minutes", "alternative 'fast_boat' uses attribute 'minutes': column is missing") in (
        found
    )
    assert ("minutes", "alternative 'slow_boat' uses attribute 'minutes': column is missing") in (
        found
    )
    assert not any("stay_home" in m for _, m in found)


@pytest.mark.parametrize("complete", [True, False])
def test_cells_not_given_hold_the_compiled_fill(model, complete):
    # complete: every alternative listed in order (the reshaping path); otherwise one
    # situation offers only two alternatives (the general path)
    rows = [
        {"situation": 1, "alternative": a, "fare": 3.0, "minutes": 10.0, "income": 50.0}
        for a in model.alternatives
    ]
    if not complete:
        rows = rows[1:]
    _, batch, problems = batch_from_table(model, pa.Table.from_pylist(rows))
    assert problems == ()
    x0, z0 = model.unset_values
    given = np.zeros(len(model.alternatives), dtype=bool)
    given[[model.alternatives.index(r["alternative"]) for r in rows]] = True
    cells = batch.attributes[0]
    # a given cell the alternative uses holds the value; any other cell holds the fill
    used_given = given[:, None] & model.required
    np.testing.assert_array_equal(cells[~used_given], x0[~used_given])
    assert np.isfinite(batch.context).all() and batch.context.shape == (1, len(z0))
