"""Benchmark of the numerical core; writes the "Core" section of docs/benchmarks.md.

    .venv/bin/python benchmarks/core_bench.py            # full run, a few minutes
    .venv/bin/python benchmarks/core_bench.py --quick    # smoke run, does not write the doc

Compares ``score`` (probabilities + logsum) with a plain NumPy reference of the same maths
(einsum for the utilities, max-shifted log-sum-exp) and with a per-row Python loop, for
N = 1e3 .. 1e6 situations, J = 5 alternatives, K = 6 attributes with generic coefficients
and alternative-specific constants; about 10% of the non-first alternatives are unavailable.
"""

from __future__ import annotations

import argparse
import math
import os
import platform
import sys
import time
import tracemalloc
from collections.abc import Callable
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from benchmarks._doc import write_section
from service.choice import (
    Batch,
    Coefficients,
    ScoreOptions,
    check_batch,
    compile_model,
    score,
    spec_from_dict,
)

COMMAND = ".venv/bin/python benchmarks/core_bench.py"
K = 6


def make_model(j: int, nested: bool = False, interactions: bool = False):
    """An invented retail-basket model: J stores, K generic attributes, J-1 constants;
    ``interactions`` adds a basket-size context variable on the price of every store and on
    each constant (2J - 1 general terms, evaluated as one block beside the dense linear block)."""
    alts = [f"store{i}" for i in range(j)]
    attrs = [f"x{k}" for k in range(K)]
    attrs[0] = "price"
    spec = {
        "name": "bench",
        "family": "nested" if nested else "multinomial",
        "alternatives": [{"id": a} for a in alts],
        "attributes": [{"name": a, **({"role": "cost"} if a == "price" else {})} for a in attrs],
        "utilities": {
            a: [{"coefficient": f"b_{x}", "attribute": x} for x in attrs]
            + ([{"coefficient": f"asc_{a}"}] if i else [])
            for i, a in enumerate(alts)
        },
    }
    rng = np.random.default_rng(1)
    if interactions:
        spec["context"] = [{"name": "basket"}]
        for i, a in enumerate(alts):
            spec["utilities"][a].append(
                {"coefficient": "b_price_basket", "attribute": "price", "context": "basket"}
            )
            if i:
                spec["utilities"][a].append({"coefficient": f"b_basket_{a}", "context": "basket"})
    est = {f"b_{x}": float(rng.normal(0, 0.5)) for x in attrs}
    if interactions:
        est["b_price_basket"] = 0.05
        est.update({f"b_basket_{a}": float(rng.normal(0, 0.2)) for a in alts[1:]})
    est["b_price"] = -0.4
    est.update({f"asc_{a}": float(rng.normal(0, 1)) for a in alts[1:]})
    if nested:
        half = j // 2
        spec["nests"] = [
            {"id": "n1", "scale": "l1", "alternatives": alts[:half]},
            {"id": "n2", "scale": "l2", "alternatives": alts[half:]},
        ]
        est.update(l1=0.6, l2=0.8)
    return compile_model(spec_from_dict(spec), Coefficients.from_mapping(est))


def make_batch(n: int, j: int, seed: int = 0, context: int = 0) -> Batch:
    rng = np.random.default_rng(seed)
    x = rng.normal(0.0, 1.0, (n, j, K))
    avail = rng.random((n, j)) >= 0.1
    avail[:, 0] = True
    return Batch(x, rng.uniform(0.5, 2.0, (n, context)), avail, np.ones(n))


def reference(model, batch: Batch) -> tuple[np.ndarray, np.ndarray]:
    """Plain NumPy MNL: einsum utilities, masked max-shifted log-sum-exp."""
    v = np.einsum("nja,ja->nj", batch.attributes, model.linear) + model.constants
    v = np.where(batch.available, v, -np.inf)
    m = v.max(axis=1, keepdims=True)
    e = np.exp(v - m)
    s = e.sum(axis=1, keepdims=True)
    return e / s, m[:, 0] + np.log(s[:, 0])


def python_loop(model, batch: Batch, rows: int) -> None:
    """Per-row, per-alternative Python arithmetic (what a naive service would do)."""
    b = model.linear.tolist()
    c = model.constants.tolist()
    x = batch.attributes[:rows].tolist()
    av = batch.available[:rows].tolist()
    for xn, an in zip(x, av, strict=True):
        v = [
            sum(bb * xx for bb, xx in zip(bj, xj, strict=True)) + cj
            for bj, xj, cj in zip(b, xn, c, strict=True)
        ]
        live = [vv for vv, a in zip(v, an, strict=True) if a]
        mx = max(live)
        s = sum(math.exp(vv - mx) for vv in live)
        _ = [math.exp(vv - mx) / s if a else 0.0 for vv, a in zip(v, an, strict=True)]
        _ = mx + math.log(s)


def best_of(fn: Callable[[], object], repeat: int) -> float:
    fn()
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def best_of_interleaved(fns: list[Callable[[], object]], repeat: int) -> list[float]:
    """Best time of each function, run in turns so that load from other processes on the
    machine falls on all of them alike."""
    for fn in fns:
        fn()
    best = [math.inf] * len(fns)
    for _ in range(repeat):
        for i, fn in enumerate(fns):
            t = time.perf_counter()
            fn()
            best[i] = min(best[i], time.perf_counter() - t)
    return best


def peak_bytes(fn: Callable[[], object]) -> int:
    tracemalloc.start()
    tracemalloc.reset_peak()
    base = tracemalloc.get_traced_memory()[0]
    fn()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return peak - base


def input_bytes(batch: Batch) -> int:
    return sum(a.nbytes for a in (batch.attributes, batch.context, batch.available, batch.weights))


def fmt(seconds: float) -> str:
    return f"{seconds * 1e3:.2f} ms" if seconds < 1 else f"{seconds:.2f} s"


def run(quick: bool) -> str:
    load_before = os.getloadavg()[0]
    sizes = [1_000, 10_000, 100_000] if quick else [1_000, 10_000, 100_000, 1_000_000]
    loop_rows = 2_000 if quick else 20_000
    model = make_model(5)
    opts = ScoreOptions()
    lines = []
    rows = []
    loop_batch = make_batch(loop_rows, 5, seed=99)
    # The loop runs in turns with the core too, so both see the same load.
    _, t_loop_rows = best_of_interleaved(
        [lambda: score(model, loop_batch, opts), lambda: python_loop(model, loop_batch, loop_rows)],
        3,
    )
    loop_per_row = t_loop_rows / loop_rows
    for n in sizes:
        batch = make_batch(n, 5)
        repeat = 11 if n >= 1_000_000 else 41
        p_core = score(model, batch, opts).probabilities
        p_ref, _ = reference(model, batch)
        assert np.allclose(p_core, p_ref, rtol=1e-12, atol=1e-300)
        t_core, t_ref = best_of_interleaved(
            [lambda: score(model, batch, opts), lambda: reference(model, batch)],  # noqa: B023
            repeat,
        )
        t_check = best_of(lambda: check_batch(model, batch), repeat)  # noqa: B023
        if n <= loop_rows:
            _, t_loop = best_of_interleaved(
                [lambda: score(model, batch, opts), lambda: python_loop(model, batch, n)],  # noqa: B023
                3,
            )
        else:
            t_loop = loop_per_row * n
        rows.append((n, t_core, t_ref, t_check, t_loop))
    lines.append(
        "| N | core `score` | NumPy reference | core / reference | Python loop "
        "(scaled) | loop / core | `check_batch` |"
    )
    lines.append("| ---: | ---: | ---: | ---: | ---: | ---: | ---: |")
    for n, t_core, t_ref, t_check, t_loop in rows:
        lines.append(
            f"| {n:,} | {fmt(t_core)} | {fmt(t_ref)} | {t_core / t_ref:.2f} | {fmt(t_loop)} "
            f"| {t_loop / t_core:,.0f}x | {fmt(t_check)} |"
        )

    n_mem = sizes[-1]
    batch = make_batch(n_mem, 5)
    peak = peak_bytes(lambda: score(model, batch, opts))
    peak_ref = peak_bytes(lambda: reference(model, batch))
    inputs = input_bytes(batch)
    mem = (
        f"Peak memory allocated while scoring N = {n_mem:,} (tracemalloc, NumPy buffers "
        f"included): core {peak / 2**20:.0f} MiB = {peak / inputs:.2f}x the input arrays' "
        f"{inputs / 2**20:.0f} MiB (reference {peak_ref / 2**20:.0f} MiB = "
        f"{peak_ref / inputs:.2f}x)."
    )

    n_mid = 100_000 if not quick else 10_000
    j_rows = []
    for j in (2, 5, 10, 20):
        m, b = make_model(j), make_batch(n_mid, j)
        t, t_r = best_of_interleaved(
            [lambda: score(m, b, opts), lambda: reference(m, b)],  # noqa: B023
            31,
        )
        j_rows.append(f"| {j} | {fmt(t)} | {fmt(t_r)} | {t / t_r:.2f} |")

    batch = make_batch(n_mid, 5)
    nested = make_model(5, nested=True)
    interacting = make_model(5, interactions=True)
    batch_with_context = make_batch(n_mid, 5, context=1)
    names = model.coefficients.names
    with_cov = compile_model(
        model.spec,
        Coefficients.from_mapping(
            model.coefficients.as_mapping(), covariance=(names, 1e-4 * np.eye(len(names)))
        ),
    )
    cases = [
        ("probabilities + logsum (default)", model, ScoreOptions()),
        ("+ surplus", model, ScoreOptions(surplus=True)),
        ("+ elasticities wrt price", model, ScoreOptions(elasticities=("price",))),
        (
            "+ elasticities wrt 3 attributes + aggregate",
            model,
            ScoreOptions(elasticities=("price", "x1", "x2"), aggregate=True),
        ),
        ("+ probability std errors (delta method)", with_cov, ScoreOptions(std_errors=True)),
        ("nested logit, default", nested, ScoreOptions()),
        ("nested logit + elasticities wrt price", nested, ScoreOptions(elasticities=("price",))),
        ("context interactions (9 general terms), default", interacting, ScoreOptions()),
    ]
    times = best_of_interleaved(
        [
            lambda m=m, o=o: score(m, batch_with_context if m is interacting else batch, o)
            for _, m, o in cases
        ],
        15,
    )
    option_rows = [
        f"| {label} | {fmt(t)} | {t / times[0]:.1f}x |"
        for (label, _, _), t in zip(cases, times, strict=True)
    ]

    load_after = os.getloadavg()[0]
    machine = f"{platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}"
    machine += f", NumPy {np.__version__}"
    at_1e5 = next(r for r in rows if r[0] == 100_000)
    ratio, speedup = at_1e5[1] / at_1e5[2], at_1e5[4] / at_1e5[1]
    worst = max(r[1] / r[2] for r in rows)

    def verdict(ok: bool) -> str:
        return "meets the bar" if ok else "MISSES the bar"

    summary = (
        f"- At N = 100,000: core / reference = {ratio:.2f} (bar <= 1.0: {verdict(ratio <= 1)}); "
        f"worst over all N: {worst:.2f}.\n"
        f"- At N = 100,000 the core is {speedup:,.0f}x faster than the per-row loop "
        f"(bar >= 50x: {verdict(speedup >= 50)}).\n"
        f"- Peak memory at N = {n_mem:,}: {peak / inputs:.2f}x the input arrays' bytes "
        f"(bar <= 3x: {verdict(peak <= 3 * inputs)})."
    )
    body = f"""
## Core

Command: `{COMMAND}`
(under two minutes here; `--quick` is a smoke run that does not write this file).

Machine: {machine}.
Times are the best of 11-41 runs; the core and the reference run in turns, so load from
other processes falls on both alike. The machine was shared while measuring (load average
{load_before:.1f} before the run, {load_after:.1f} after), so absolute times are pessimistic;
the ratios are the figures to read.

Model: multinomial logit, J = 5 alternatives, K = 6 attributes with generic coefficients
plus 4 alternative-specific constants; about 10% of the non-first alternatives unavailable.
The reference is plain NumPy on the same arrays (einsum utilities, masked max-shifted
log-sum-exp, situation-major); the core works alternative-major (stacked matrix-vector
products over cache-sized blocks of rows, reductions over contiguous rows, in place).
The per-row Python loop (best of 3, in turns with the core) is timed directly up to
N = {loop_rows:,}; above that its time per row on {loop_rows:,} rows is scaled linearly.
`check_batch` (all boundary checks) is timed separately.

{summary}

{chr(10).join(lines)}

{mem}

Growth with J (N = {n_mid:,}):

| J | core | reference | core / reference |
| ---: | ---: | ---: | ---: |
{chr(10).join(j_rows)}

Growth with what is requested (N = {n_mid:,}, J = 5):

| options | time | vs default |
| --- | ---: | ---: |
{chr(10).join(option_rows)}
"""
    return body


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small sizes; do not write the doc")
    args = parser.parse_args()
    body = run(args.quick)
    print(body)
    if not args.quick:
        write_section("core", body)


if __name__ == "__main__":
    main()
