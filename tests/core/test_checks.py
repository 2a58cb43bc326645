"""Boundary checks of batches: every finding names its situation and field."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import pytest

from service.choice import Batch, BatchProblem, ScoreOptions, ScoringError, check_batch, score
from tests.core.conftest import commute_batch, commute_model, commute_spec, model_from


def record(**overrides):
    rec = {
        "attributes": {
            "car": {"fare": 4.0, "time": 25.0},
            "bus": {"fare": 2.0, "time": 40.0, "wait": 6.0},
            "rail": {"fare": 3.0, "time": 30.0, "wait": 4.0},
            "bike": {"time": 45.0},
        },
        "context": {"income": 45.0},
    }
    rec.update(overrides)
    return rec


def fields(problems):
    return {(p.situation, p.field) for p in problems}


def test_records_fill_arrays_in_the_models_axis_order(mnl):
    batch, problems = Batch.from_records(mnl, [record(), record(weight=2.5)])
    assert problems == ()
    assert batch.attributes.shape == (2, 4, 3) and batch.context.shape == (2, 1)
    assert batch.attributes[0, 1, 2] == 6.0  # bus wait
    assert batch.attributes[0, 3, 0] == 0.0  # bike has no fare term: unused cell is 0
    np.testing.assert_array_equal(batch.weights, [1.0, 2.5])
    assert batch.available.all()
    assert check_batch(mnl, batch).ok


def test_model_lists_the_cells_and_context_it_uses(mnl):
    assert ("bus", "wait") in mnl.required_attributes
    assert ("bike", "fare") not in mnl.required_attributes
    assert mnl.required_context == ("income",)


def test_records_report_unknown_names_and_wrong_types_by_field(mnl):
    rec = record(color="red", available={"car": True, "tram": False, "bus": "yes"})
    rec["attributes"]["tram"] = {"fare": 1.0}
    rec["attributes"]["car"]["comfort"] = 3
    rec["attributes"]["rail"]["fare"] = "cheap"
    rec["context"]["age"] = 40
    batch, problems = Batch.from_records(mnl, [record(), rec, 7])
    assert fields(problems) == {
        (1, ("color",)),
        (1, ("attributes", "tram")),
        (1, ("attributes", "car", "comfort")),
        (1, ("attributes", "rail", "fare")),
        (1, ("context", "age")),
        (1, ("available", "tram")),
        (1, ("available", "bus")),
        (2, ()),
    }
    # The wrongly typed rail fare is left missing, so the check names it too.
    assert (1, ("attributes", "rail", "fare")) in fields(check_batch(mnl, batch).problems)


def test_missing_used_values_are_problems_naming_the_field(mnl):
    rec = record()
    del rec["attributes"]["bus"]["wait"]
    del rec["context"]["income"]
    batch, problems = Batch.from_records(mnl, [record(), rec])
    assert problems == ()
    check = check_batch(mnl, batch)
    assert fields(check.problems) == {
        (1, ("attributes", "bus", "wait")),
        (1, ("context", "income")),
    }
    assert all("finite" in p.message for p in check.problems)


def test_missing_values_of_an_unavailable_alternative_are_fine(mnl):
    rec = record(available={"bus": False})
    del rec["attributes"]["bus"]
    batch, _ = Batch.from_records(mnl, [rec])
    assert check_batch(mnl, batch).ok
    assert score(mnl, batch).probabilities[0, 1] == 0.0


def test_log_and_log1p_domains_are_checked(mnl):
    a = record()
    a["attributes"]["car"]["time"] = 0.0  # log(time)
    b = record()
    b["attributes"]["bus"]["wait"] = -1.0  # log1p(wait)
    c = record()
    c["attributes"]["rail"]["wait"] = -1.0  # identity: fine
    batch, _ = Batch.from_records(mnl, [a, b, c])
    check = check_batch(mnl, batch)
    assert fields(check.problems) == {
        (0, ("attributes", "car", "time")),
        (1, ("attributes", "bus", "wait")),
    }
    assert "log" in check.problems[0].message and "log1p" in check.problems[1].message


def test_a_situation_with_no_available_alternative_is_named(mnl):
    rec = record(available=dict.fromkeys(("car", "bus", "rail", "bike"), False))
    batch, _ = Batch.from_records(mnl, [record(), rec])
    assert fields(check_batch(mnl, batch).problems) == {(1, ("available",))}
    with pytest.raises(ScoringError) as err:
        score(mnl, batch)  # scoring an unchecked bad batch refuses; it never returns NaN
    assert err.value.problems[0].path == "situations[1]"


def test_weights_must_be_finite_non_negative_with_positive_sum(mnl):
    batch, _ = Batch.from_records(mnl, [record(weight=-1), record(weight=float("nan"))])
    assert fields(check_batch(mnl, batch).problems) == {(0, ("weight",)), (1, ("weight",))}
    batch, _ = Batch.from_records(mnl, [record(weight=0), record(weight=0.0)])
    assert check_batch(mnl, batch).problems == (
        BatchProblem(-1, ("weight",), "weights must have a positive sum"),
    )


def test_wrong_shapes_are_reported_not_raised(mnl):
    good = commute_batch(mnl, 3)
    bad = Batch(good.attributes[:, :2], good.context, good.available, good.weights.astype(int))
    assert {p.field for p in check_batch(mnl, bad).problems} == {("attributes",), ("weights",)}


def test_problem_lists_are_capped_and_counted(mnl):
    batch = commute_batch(mnl, 1000)
    batch.context[:] = np.nan
    check = check_batch(mnl, batch)
    assert len(check.problems) == 100 and check.problem_count == 1000
    assert check.omitted_problems == 900
    assert [p.situation for p in check.problems] == list(range(100))


@pytest.mark.parametrize("policy", ["warn", "reject", "clip"])
def test_range_policy(policy):
    spec = dict(commute_spec(), range_policy=policy)
    model = model_from(spec, commute_model().coefficients.as_mapping())
    hi = record()
    hi["attributes"]["bus"]["fare"] = 45.0  # estimation range [0, 30]
    batch, _ = Batch.from_records(model, [record(), hi])
    check = check_batch(model, batch)
    found = fields(check.warnings if policy != "reject" else check.problems)
    assert found == {(1, ("attributes", "bus", "fare"))}
    if policy == "clip":
        assert check.batch is not batch and check.batch.attributes[1, 1, 0] == 30.0
        assert batch.attributes[1, 1, 0] == 45.0  # the input is never modified
    else:
        assert check.batch is batch
    if policy == "warn":
        assert check.ok and "outside" in check.warnings[0].message


def test_scoring_an_unchecked_empty_or_weightless_batch_refuses(mnl):
    empty = commute_batch(mnl, 0)
    assert check_batch(mnl, empty).problems[0].field == ("situations",)
    with pytest.raises(ScoringError):
        score(mnl, empty)
    weightless = commute_batch(mnl, 3)
    weightless.weights[:] = 0.0
    with pytest.raises(ScoringError) as err:
        score(mnl, weightless, ScoreOptions(aggregate=True))
    assert err.value.problems[0].path == "weights"


def brute_force_findings(model, batch):
    """Every (situation, field) the check must find, value by value (plain Python)."""
    found = set()
    for n in range(batch.size):
        for j, alt in enumerate(model.alternatives):
            if not batch.available[n, j]:
                continue
            for a, attr in enumerate(model.attributes):
                if not model.required[j, a]:
                    continue
                v = batch.attributes[n, j, a]
                if (
                    not np.isfinite(v)
                    or (model.log_cells[j, a] and v <= 0)
                    or (model.log1p_cells[j, a] and v <= -1)
                ):
                    found.add((n, ("attributes", alt, attr)))
        if not np.isfinite(batch.context[n, 0]):
            found.add((n, ("context", "income")))
        if not batch.available[n].any():
            found.add((n, ("available",)))
    return found


@pytest.mark.parametrize("chunk", [3, 64, 2**16])
def test_blockwise_checks_find_exactly_what_a_value_by_value_check_finds(mnl, chunk, monkeypatch):
    import service.choice.checks as checks

    monkeypatch.setattr(checks, "CHUNK_VALUES", chunk)
    batch = commute_batch(mnl, 400, seed=12, p_unavailable=0.3)
    rng = np.random.default_rng(13)
    x = batch.attributes
    x[rng.random(x.shape) < 0.01] = np.nan
    x[:, :, 1][rng.random(x.shape[:2]) < 0.01] = 0.0  # time under log
    x[:, :, 2][rng.random(x.shape[:2]) < 0.01] = -3.0  # wait: log1p for bus only
    batch.context[rng.random(400) < 0.02] = np.inf
    batch.available[rng.random(400) < 0.01] = False
    expected = brute_force_findings(mnl, batch)
    check = check_batch(mnl, batch, max_reported=10_000)
    # Source: the definitions of the checks applied one value at a time (common practice).
    assert fields(check.problems) == expected
    assert check.problem_count == len(expected)
    capped = check_batch(mnl, batch)
    assert capped.problem_count == len(expected)
    assert list(capped.problems) == sorted(check.problems, key=lambda p: p.situation)[:100]


def test_clipping_applies_to_every_block(mnl, monkeypatch):
    import service.choice.checks as checks

    monkeypatch.setattr(checks, "CHUNK_VALUES", 10)
    spec = dict(commute_spec(), range_policy="clip")
    model = model_from(spec, commute_model().coefficients.as_mapping())
    batch = commute_batch(model, 50, seed=14)
    batch.attributes[:, 1, 0] = 99.0  # bus fare above 30 everywhere
    check = check_batch(model, batch)
    assert check.warning_count == 50 and check.ok
    np.testing.assert_array_equal(check.batch.attributes[:, 1, 0], 30.0)


@pytest.mark.parametrize("policy", ["warn", "reject", "clip"])
def test_range_policy_applies_to_context_variables(policy):
    spec = dict(commute_spec(), range_policy=policy)
    spec["context"] = [{"name": "income", "low": 10, "high": 150}]
    model = model_from(spec, commute_model().coefficients.as_mapping())
    batch, _ = Batch.from_records(model, [record(), record(context={"income": 400.0})])
    check = check_batch(model, batch)
    found = fields(check.warnings if policy != "reject" else check.problems)
    assert found == {(1, ("context", "income"))}
    if policy == "clip":
        assert check.batch.context[1, 0] == 150.0 and batch.context[1, 0] == 400.0
        assert check.batch.attributes is batch.attributes  # nothing else copied


@pytest.mark.parametrize("family", ["multinomial", "nested"])
def test_utilities_that_overflow_are_refused_naming_the_situation(family):
    model = commute_model(family)
    batch = commute_batch(model, 5, seed=15)
    batch.attributes[3, 2, 0] = 1e200  # rail fare, which interacts with income
    batch.context[3, 0] = 1e200  # fare * income overflows to inf
    assert check_batch(model, batch).ok  # finite values; only a warning for the range
    with pytest.raises(ScoringError) as err:
        score(model, batch)  # no NaN, no RuntimeWarning (the suite makes them errors)
    assert [p.path for p in err.value.problems] == ["situations[3]"]


TRICKY = [np.nan, np.inf, -np.inf, -3.0, -1.0, -0.5, 0.0, 5e-324, 0.5, 1.0, 30.0, 30.5, 180.0,
          180.1, 1e308, -1e308]  # fmt: skip
"""Values on and beside every bound of the commute model (domain 0 and -1, ranges [0, 30]
and [1, 180]), non-finite ones and the largest floats."""


@pytest.mark.parametrize("policy", ["warn", "reject", "clip"])
def test_a_batch_accepted_at_once_is_one_the_full_check_finds_nothing_in(policy, monkeypatch):
    """check_batch accepts a small batch in a few whole-batch comparisons when nothing is to
    be reported; with that shortcut disabled (CHUNK_VALUES = 0) the full check must agree,
    finding for finding, on batches built from values at and beside every bound."""
    import hypothesis.strategies as st
    from hypothesis import given, settings

    import service.choice.checks as checks

    spec = dict(commute_spec(), range_policy=policy)
    spec["context"] = [{"name": "income", "low": 10, "high": 150}]
    model = model_from(spec, commute_model().coefficients.as_mapping())
    j, a = len(model.alternatives), len(model.attributes)
    inside = st.floats(10.0, 30.0)  # inside every range of the model
    accepted = []

    @settings(max_examples=300, deadline=None)
    @given(n=st.integers(1, 3), data=st.data())
    def agree(n, data):
        # Plausible situations, then up to three values replaced by tricky ones.
        x = np.array(data.draw(st.lists(inside, min_size=n * j * a, max_size=n * j * a)))
        z = np.array(data.draw(st.lists(inside, min_size=n, max_size=n)))
        avail = np.array(data.draw(st.lists(st.booleans(), min_size=n * j, max_size=n * j)))
        w = np.ones(n)
        for _ in range(data.draw(st.integers(0, 3))):
            target = data.draw(st.sampled_from(["x", "z", "w"]))
            arr = {"x": x, "z": z, "w": w}[target]
            arr[data.draw(st.integers(0, len(arr) - 1))] = data.draw(st.sampled_from(TRICKY))
        batch = Batch(attributes=x.reshape(n, j, a), context=z.reshape(n, 1),
                      available=avail.reshape(n, j), weights=w)  # fmt: skip
        with np.errstate(over="ignore"):
            quick = check_batch(model, batch)
            with monkeypatch.context() as m:
                m.setattr(checks, "CHUNK_VALUES", 0)
                full = check_batch(model, batch)
        assert quick.problems == full.problems and quick.warnings == full.warnings
        assert (quick.problem_count, quick.warning_count) == (
            full.problem_count,
            full.warning_count,
        )
        np.testing.assert_array_equal(quick.batch.attributes, full.batch.attributes)
        np.testing.assert_array_equal(quick.batch.context, full.batch.context)
        if not (full.problem_count or full.warning_count):
            assert checks._nothing_to_report(model, batch)
            accepted.append(n)

    agree()
    assert accepted  # the shortcut was taken, not only the full check


@pytest.mark.parametrize("policy", ["warn", "reject", "clip"])
def test_every_value_at_or_beside_a_bound_is_judged_alike_at_once_and_in_full(policy, monkeypatch):
    """One situation, one value at a time set to each tricky value (every used cell, the
    context variable and the weight, with its alternative available or not): the shortcut
    of check_batch accepts exactly the situations in which the full check finds nothing."""
    import service.choice.checks as checks

    spec = dict(commute_spec(), range_policy=policy)
    spec["context"] = [{"name": "income", "low": 10, "high": 150}]
    model = model_from(spec, commute_model().coefficients.as_mapping())
    base = commute_batch(model, 1, seed=3)
    base.attributes[:] = 20.0  # inside every range
    base.context[:] = 20.0
    targets = [("x", (0, j, a)) for j, a in zip(*np.nonzero(model.required), strict=True)]
    targets += [("z", (0, 0)), ("w", (0,))]
    accepted = refused = 0
    for (kind, where), value, available in (
        (t, v, av) for t in targets for v in TRICKY for av in (True, False)
    ):
        x, z, w = base.attributes.copy(), base.context.copy(), base.weights.copy()
        avail = np.ones_like(base.available)
        {"x": x, "z": z, "w": w}[kind][where] = value
        if kind == "x":
            avail[0, where[1]] = available
        batch = Batch(attributes=x, context=z, available=avail, weights=w)
        with monkeypatch.context() as m:
            m.setattr(checks, "CHUNK_VALUES", 0)
            full = check_batch(model, batch)
        clean = not (full.problem_count or full.warning_count)
        assert checks._nothing_to_report(model, batch) == clean, (kind, where, value, available)
        accepted += clean
        refused += not clean
    assert accepted and refused


def test_weights_whose_sum_overflows_are_still_a_positive_sum(mnl):
    """The full check (here taken because a value lies outside its range) sums the weights:
    1e308 + 1e308 overflows to inf, which is positive, and must not raise (warnings are
    errors in this suite)."""
    batch = commute_batch(mnl, 2, seed=4)
    batch.weights[:] = 1e308
    batch.attributes[0, 0, 0] = 99.0  # car fare above the range [0, 30]: a warning
    check = check_batch(mnl, batch)
    assert check.ok and check.warning_count == 1


class _Pairs(Mapping):
    """A mapping over key-value pairs, whose keys need not be hashable."""

    def __init__(self, pairs):
        self.pairs = pairs

    def __getitem__(self, key):
        for k, v in self.pairs:
            if k == key:
                return v
        raise KeyError(key)

    def __iter__(self):
        return iter(k for k, _ in self.pairs)

    def __len__(self):
        return len(self.pairs)


def test_a_record_with_an_unhashable_key_is_decoded_with_that_key_named(mnl):
    record = _Pairs([(["x"], 1), ("weight", 2.0)])
    batch, problems = Batch.from_records(mnl, [record])
    assert [(p.field, p.message) for p in problems] == [(("['x']",), "unknown field")]
    assert batch.weights.tolist() == [2.0]
