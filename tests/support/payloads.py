"""Valid scoring inputs for any model spec, and the answers they must get.

- :func:`situations_for` draws situations a model can score: every attribute and context value
  the utilities use, inside the range seen in estimation and inside the domain of its transform.
- :func:`core_probabilities` scores them with the numerical core (what the service must return,
  bit for bit, for the version it names).
- :func:`reference_probabilities` recomputes them independently with plain Python ``math``
  from the published formulas (Train 2009, eq. 3.6 for logit and eq. 4.2 for nested logit, both
  from memory), so a test does not only compare the service with itself.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from service.choice import Batch, ScoreOptions, check_batch, compile_model, score
from service.choice.spec import Coefficients, ModelSpec


def used_attributes(spec: ModelSpec) -> dict[str, set[str]]:
    """Attributes each alternative's utility uses."""
    return {
        alt: {t.attribute for t in terms if t.attribute is not None}
        for alt, terms in spec.utilities.items()
    }


def used_context(spec: ModelSpec) -> set[str]:
    return {t.context for terms in spec.utilities.values() for t in terms if t.context}


def _bounds(spec: ModelSpec, name: str, kind: str) -> tuple[float, float]:
    """A closed interval inside the estimation range and every transform's domain."""
    variables = spec.attributes if kind == "attribute" else spec.context
    var = next(v for v in variables if v.name == name)
    low = var.low if var.low is not None else 0.5
    high = var.high if var.high is not None else max(low + 10.0, 10.0)
    transforms = {
        t.transform for terms in spec.utilities.values() for t in terms if t.attribute == name
    }
    if "log" in transforms:
        low = max(low, 1e-3)
    if "log1p" in transforms:
        low = max(low, -0.999)
    return low, max(high, low)


def situations_for(spec: ModelSpec, n: int, seed: int = 0) -> list[dict[str, Any]]:
    """``n`` scoreable situations (rows form), values rounded to 3 decimals, all available."""
    rng = np.random.default_rng(seed)
    attrs = used_attributes(spec)
    context = sorted(used_context(spec))
    out = []
    for i in range(n):
        situation: dict[str, Any] = {"id": f"s{i}", "attributes": {}, "context": {}}
        for alt in spec.alternative_ids:
            values = {}
            for name in sorted(attrs.get(alt, ())):
                low, high = _bounds(spec, name, "attribute")
                values[name] = round(float(rng.uniform(low, high)), 3)
            if values:
                situation["attributes"][alt] = values
        for name in context:
            low, high = _bounds(spec, name, "context")
            situation["context"][name] = round(float(rng.uniform(low, high)), 3)
        out.append(situation)
    return out


def batches_for(
    spec: ModelSpec, count: int, seed: int, max_size: int = 3
) -> list[list[dict[str, Any]]]:
    """``count`` request bodies' worth of situations, of 1 to ``max_size`` situations each."""
    return [situations_for(spec, 1 + i % max_size, seed=seed + i) for i in range(count)]


def core_probabilities(
    spec: ModelSpec, coefficients: Coefficients, situations: Sequence[Mapping[str, Any]]
) -> list[dict[str, float]]:
    """Probabilities of every alternative per situation, from the core (checked batch)."""
    model = compile_model(spec, coefficients)
    batch, problems = Batch.from_records(model, situations)
    assert not problems, problems
    check = check_batch(model, batch)
    assert check.ok, check.problems
    result = score(model, check.batch, ScoreOptions(probabilities=True, logsum=False))
    assert result.probabilities is not None
    return [
        dict(zip(model.alternatives, row, strict=True)) for row in result.probabilities.tolist()
    ]


def _transform(kind: str, x: float) -> float:
    return {"identity": x, "log": math.log(x) if x > 0 else math.nan}.get(kind, math.log1p(x))


def utilities(
    spec: ModelSpec, coefficients: Coefficients, situation: Mapping[str, Any]
) -> dict[str, float]:
    """V_j = sum over terms of beta * t(x_j) * z (Train 2009, sec. 2.5, linear in parameters)."""
    beta = coefficients.as_mapping()
    attrs = situation.get("attributes", {})
    ctx = situation.get("context", {})
    out = {}
    for alt in spec.alternative_ids:
        v = 0.0
        for term in spec.utilities.get(alt, ()):
            x = (
                1.0
                if term.attribute is None
                else _transform(term.transform, float(attrs[alt][term.attribute]))
            )
            z = 1.0 if term.context is None else float(ctx[term.context])
            v += beta[term.coefficient] * x * z
        out[alt] = v
    return out


def reference_probabilities(
    spec: ModelSpec, coefficients: Coefficients, situation: Mapping[str, Any]
) -> dict[str, float]:
    """Logit P_i = exp V_i / sum_j exp V_j (Train 2009, eq. 3.6, from memory), or nested logit
    P_i = exp(V_i/l_k) (sum_{j in B_k} exp(V_j/l_k))^(l_k - 1) /
    sum_l (sum_{j in B_l} exp(V_j/l_l))^l_l (Train 2009, eq. 4.2, from memory); unavailable
    alternatives get 0.  Plain ``math``, one situation at a time, shifted by max V."""
    v = utilities(spec, coefficients, situation)
    available = {a: bool(situation.get("available", {}).get(a, True)) for a in v}
    live = [a for a in v if available[a]]
    shift = max(v[a] for a in live)
    if not spec.nests:
        weights = {a: math.exp(v[a] - shift) for a in live}
        total = sum(weights.values())
        return {a: (weights[a] / total if available[a] else 0.0) for a in v}
    beta = coefficients.as_mapping()
    inclusive: dict[str, float] = {}
    scale: dict[str, float] = {}
    nest_of: dict[str, str] = {}
    for nest in spec.nests:
        lam = beta[nest.scale]
        members = [a for a in nest.alternatives if available[a]]
        scale[nest.id] = lam
        for a in nest.alternatives:
            nest_of[a] = nest.id
        if members:
            inclusive[nest.id] = sum(math.exp((v[a] - shift) / lam) for a in members)
    denominator = sum(s ** scale[k] for k, s in inclusive.items())
    out = {}
    for a in v:
        if not available[a]:
            out[a] = 0.0
            continue
        k = nest_of[a]
        lam = scale[k]
        out[a] = math.exp((v[a] - shift) / lam) * inclusive[k] ** (lam - 1) / denominator
    return out


def score_plan(
    model: str,
    batches: Sequence[Sequence[Mapping[str, Any]]],
    token: str | None = None,
    keyed_every: int = 2,
) -> list[dict[str, Any]]:
    """Load-generator requests scoring each batch on the routed endpoint; every
    ``keyed_every``-th one carries a routing key (sticky), the others are randomly assigned."""
    headers = {"Authorization": f"Bearer {token}"} if token else {}
    plan = []
    for i, situations in enumerate(batches):
        body: dict[str, Any] = {"situations": list(situations)}
        if keyed_every and i % keyed_every == 0:
            body["routing_key"] = f"customer-{i}"
        plan.append(
            {
                "method": "POST",
                "path": f"/v1/models/{model}/score",
                "headers": headers,
                "body": body,
            }
        )
    return plan


def verify_answers(
    report: Mapping[str, Any],
    batches: Sequence[Sequence[Mapping[str, Any]]],
    store: Any,
    model: str,
) -> dict[str, int]:
    """Check every distinct answer of a load report: its probabilities are exactly the core's
    for the version it names (and close to the published formula), and that version was live
    at the routing generation it names.  Returns responses counted per version."""
    loaded: dict[str, Any] = {}
    history = {state.generation: state for state in store.history(model)}
    seen: dict[str, int] = {}
    for answer in report["answers"]:
        version, generation = answer["version"], answer["generation"]
        if version not in loaded:
            loaded[version] = store.load_version(model, version)
        artifact = loaded[version]
        situations = batches[answer["request"]]
        expected = core_probabilities(artifact.spec, artifact.coefficients, situations)
        assert answer["probabilities"] == expected, (
            f"request {answer['request']} answered by {version} differs from the core"
        )
        for got, situation in zip(answer["probabilities"], situations, strict=True):
            ref = reference_probabilities(artifact.spec, artifact.coefficients, situation)
            for alt, p in got.items():
                assert math.isclose(p, ref[alt], rel_tol=1e-9, abs_tol=1e-12), (alt, p, ref)
        state = history.get(generation)
        assert state is not None, f"answer names routing generation {generation}, not recorded"
        live = {v for v, w in state.live.items() if w > 0}
        assert version in live, f"{version} answered at generation {generation} (live: {live})"
        seen[version] = seen.get(version, 0) + answer["count"]
    return seen
