"""The long-table codec: the same batch as the core's record converter, and every bad cell
named by row and column."""

from __future__ import annotations

import io

import numpy as np
import pyarrow as pa
import pyarrow.csv as pcsv
import pytest
from store_cases import FERRY_SPEC, ferry_coefficients

from service.choice import Batch, ScoreOptions, check_batch, compile_model, score, spec_from_dict
from service.codecs.long_table import batch_from_table, read_table

ALTS = ("fast_boat", "slow_boat", "stay_home")


@pytest.fixture(scope="module")
def model():
    return compile_model(spec_from_dict(FERRY_SPEC), ferry_coefficients())


def random_situations(n: int, seed: int = 1):
    """Records and the equivalent long table, with some alternatives not offered."""
    rng = np.random.default_rng(seed)
    records, rows = [], []
    for i in range(n):
        offered = [a for a in ALTS if a == "stay_home" or rng.random() > 0.2]
        income = float(rng.uniform(5, 200))
        weight = float(rng.uniform(0.5, 2))
        attrs = {}
        for a in offered:
            values = {"fare": float(rng.uniform(1, 40)), "minutes": float(rng.uniform(5, 120))}
            if a != "stay_home":
                attrs[a] = values
            rows.append(
                {
                    "situation": f"s{i}",
                    "alternative": a,
                    **values,
                    "income": income,
                    "weight": weight,
                }
            )
        records.append(
            {
                "attributes": attrs,
                "context": {"income": income},
                "available": {a: a in offered for a in ALTS},
                "weight": weight,
            }
        )
    return records, pa.Table.from_pylist(rows)


def test_same_batch_as_the_record_converter(model):
    records, table = random_situations(200)
    ids, batch, problems = batch_from_table(model, table)
    expected, record_problems = Batch.from_records(model, records)
    assert problems == () and record_problems == ()
    assert ids.to_pylist() == [f"s{i}" for i in range(200)]
    np.testing.assert_array_equal(batch.available, expected.available)
    live = np.broadcast_to(expected.available[:, :, None], expected.attributes.shape)
    np.testing.assert_array_equal(batch.attributes[live], expected.attributes[live])
    np.testing.assert_array_equal(batch.context, expected.context)
    np.testing.assert_array_equal(batch.weights, expected.weights)


def test_row_order_does_not_matter_and_probabilities_match_the_logit_formula(model):
    _, table = random_situations(150, seed=3)
    shuffled = table.take(np.random.default_rng(0).permutation(len(table)))
    ids, batch, problems = batch_from_table(model, shuffled)
    assert problems == ()
    checked = check_batch(model, batch)
    assert checked.ok
    p = score(model, checked.batch, ScoreOptions()).probabilities
    # P_ni = exp(V_ni) / sum_j exp(V_nj) over the offered alternatives (Train 2009, eq. 3.6; from memory)
    beta = dict(zip(ferry_coefficients().names, ferry_coefficients().estimates, strict=True))
    rows = shuffled.to_pylist()
    for n, sid in enumerate(ids.to_pylist()):
        v = {}
        for r in (r for r in rows if r["situation"] == sid):
            a = r["alternative"]
            if a == "stay_home":
                v[a] = 0.0
                continue
            asc = beta["asc_fast"] if a == "fast_boat" else beta["asc_slow"]
            v[a] = asc + beta["b_fare"] * r["fare"] + beta["b_minutes"] * np.log(r["minutes"])
            if a == "slow_boat":
                v[a] += beta["b_slow_income"] * r["income"]
        denom = sum(np.exp(x) for x in v.values())
        for j, a in enumerate(ALTS):
            assert p[n, j] == pytest.approx(np.exp(v[a]) / denom if a in v else 0.0, abs=1e-12)


def test_csv_population_reads_alike(model, tmp_path):
    _, table = random_situations(20, seed=5)
    path = tmp_path / "population.csv"
    pcsv.write_csv(table, path)
    ids, batch, problems = batch_from_table(model, read_table(path))
    ids2, batch2, _ = batch_from_table(model, table)
    assert problems == ()
    assert ids.to_pylist() == ids2.to_pylist()
    np.testing.assert_allclose(batch.attributes, batch2.attributes, equal_nan=True)


def problems_of(model, text: str):
    table = pcsv.read_csv(io.BytesIO(text.encode()))
    return [(p.row, p.column, p.message) for p in batch_from_table(model, table)[2]]


HEADER = "situation,alternative,fare,minutes,income"


@pytest.mark.parametrize(
    ("rows", "expected"),
    [
        (["1,fast_boat,3,10,50", "1,ferry,3,10,50"], (1, "alternative", "not an alternative")),
        (["1,fast_boat,3,10,50", "1,fast_boat,4,10,50"], (1, "alternative", "appears twice")),
        (["1,fast_boat,,10,50", "1,stay_home,,,50"], (0, "fare", "is null")),
        (["1,fast_boat,3,10,50", "1,slow_boat,3,10,60"], (1, "income", "constant within")),
        (["1,fast_boat,3,10,50", "1,slow_boat,3,10,"], (1, "income", "constant within")),
        (["1,fast_boat,3,10,50", ",slow_boat,3,10,50"], (1, "situation", "is null")),
        (["1,fast_boat,3,10,50", "1,,3,10,50"], (1, "alternative", "not an alternative")),
        (["1,fast_boat,3,10,50", "1,slow_boat,inf,10,50"], (1, "fare", "finite")),
    ],
)
def test_bad_cells_are_named_by_row_and_column(model, rows, expected):
    found = problems_of(model, "\n".join([HEADER, *rows]))
    row, column, message = expected
    assert any(r == row and c == column and message in m for r, c, m in found), found


def test_null_in_an_unused_cell_is_fine(model):
    # stay_home uses no attribute: its cells may be empty
    assert problems_of(model, f"{HEADER}\n1,fast_boat,3,10,50\n1,stay_home,,,50") == []


def test_whole_table_problems(model):
    found = problems_of(model, "situation,alternative,fare,colour\n1,fast_boat,3,red")
    assert (-1, "colour", "unknown column (not an attribute or context variable)") in found
    assert any(c == "minutes" and "missing" in m for _, c, m in found)
    assert any(c == "income" and "missing" in m for _, c, m in found)
    found = problems_of(model, f"{HEADER}\n1,fast_boat,cheap,10,50")
    assert found == [(-1, "fare", "must be a numeric column, not string")]
    found = problems_of(model, f"{HEADER},available\n1,fast_boat,3,10,50,maybe")
    assert found == [(-1, "available", "must be a boolean column, not string")]


def test_available_false_keeps_the_row_out(model):
    table = pcsv.read_csv(
        io.BytesIO(f"{HEADER},available\n1,fast_boat,3,10,50,false\n1,stay_home,,,50,true".encode())
    )
    _, batch, problems = batch_from_table(model, table)
    assert problems == ()
    assert batch.available.tolist() == [[False, False, True]]


def test_null_ids_in_arrow_tables(model):
    table = pa.table(
        {
            "situation": [1, None, 2],
            "alternative": ["fast_boat", "slow_boat", None],
            "fare": [3.0, 3.0, 3.0],
            "minutes": [10.0, 10.0, 10.0],
            "income": [50.0, 50.0, 50.0],
        }
    )
    found = [(p.row, p.column, p.message) for p in batch_from_table(model, table)[2]]
    assert found == [(1, "situation", "is null"), (2, "alternative", "is null")]


def test_many_problems_are_capped_and_counted(model):
    rows = [f"{i},ferry,3,10,50" for i in range(300)]
    found = problems_of(model, "\n".join([HEADER, *rows]))
    assert len(found) == 101
    assert found[-1] == (-1, "", "200 more problems not listed")


def test_integer_ids_in_any_order_and_dictionary_alternatives(model):
    _, table = random_situations(60, seed=8)
    ids = [int(s[1:]) for s in table["situation"].to_pylist()]
    as_ints = table.set_column(0, "situation", pa.array(ids))
    order = np.random.default_rng(2).permutation(len(table))
    shuffled = as_ints.take(order)
    coded = shuffled.set_column(
        1, "alternative", shuffled["alternative"].combine_chunks().dictionary_encode()
    )
    got_ids, batch, problems = batch_from_table(model, coded)
    ref_ids, ref, _ = batch_from_table(model, as_ints)  # grouped and sorted: the fast path
    assert problems == ()
    position = {v: i for i, v in enumerate(got_ids.to_pylist())}
    perm = [position[v] for v in ref_ids.to_pylist()]
    np.testing.assert_array_equal(batch.available[perm], ref.available)
    np.testing.assert_array_equal(batch.attributes[perm], ref.attributes)
    np.testing.assert_array_equal(batch.context[perm], ref.context)


def complete_table(n: int, seed: int = 11) -> pa.Table:
    """Every situation offers every alternative, in model order (the reshape path)."""
    rng = np.random.default_rng(seed)
    rows = n * len(ALTS)
    return pa.table(
        {
            "situation": np.repeat(np.arange(n), len(ALTS)),
            "alternative": np.tile(np.array(ALTS), n),
            "fare": rng.uniform(1, 40, rows),
            "minutes": rng.uniform(5, 120, rows),
            "income": np.repeat(rng.uniform(5, 200, n), len(ALTS)),
            "weight": np.repeat(rng.uniform(0.5, 2, n), len(ALTS)),
            "available": rng.random(rows) > 0.1,
        }
    )


def test_complete_tables_match_the_general_path(model):
    table = complete_table(80)
    ids, batch, problems = batch_from_table(model, table)
    reversed_rows = table.take(np.arange(len(table))[::-1])  # forces the general path
    ids2, batch2, problems2 = batch_from_table(model, reversed_rows)
    assert problems == problems2 == ()
    perm = np.argsort(ids2.to_numpy())
    assert ids.to_pylist() == list(range(80))
    np.testing.assert_array_equal(batch.available, batch2.available[perm])
    np.testing.assert_array_equal(batch.attributes, batch2.attributes[perm])
    np.testing.assert_array_equal(batch.context, batch2.context[perm])
    np.testing.assert_array_equal(batch.weights, batch2.weights[perm])


def test_complete_table_problems_name_rows(model):
    table = complete_table(4)
    income = table["income"].to_numpy().copy()
    income[4] += 1.0  # situation 1, second row
    fare = table["fare"].to_numpy().copy()
    fare[6] = np.inf
    table = table.set_column(4, "income", pa.array(income)).set_column(2, "fare", pa.array(fare))
    available = table["available"].to_numpy(zero_copy_only=False).copy()
    available[6] = True
    table = table.set_column(6, "available", pa.array(available))
    found = {(p.row, p.column) for p in batch_from_table(model, table)[2]}
    assert found == {(4, "income"), (6, "fare")}
