"""Shared cases of the CLI tests: a ferry population and the logit formulas to check against."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

ALTS = ("fast_boat", "slow_boat", "stay_home")


def ferry_population(path: Path, n: int = 400, seed: int = 4) -> Path:
    """A long table: every situation offers the three alternatives, weights vary."""
    rng = np.random.default_rng(seed)
    rows = n * 3
    table = pa.table(
        {
            "situation": np.repeat(np.arange(n), 3),
            "alternative": np.tile(np.array(ALTS), n),
            "fare": rng.uniform(2, 30, rows),
            "minutes": rng.uniform(10, 100, rows),
            "income": np.repeat(rng.uniform(10, 150, n), 3),
            "weight": np.repeat(rng.uniform(0.5, 2.0, n), 3),
        }
    )
    pq.write_table(table, path)
    return path


def ferry_utilities(beta: dict[str, float], path: Path) -> tuple[np.ndarray, np.ndarray]:
    """(V (N, 3), weights (N,)) of the ferry model, written out term by term."""
    t = pq.read_table(path).to_pydict()
    fare = np.array(t["fare"]).reshape(-1, 3)
    minutes = np.array(t["minutes"]).reshape(-1, 3)
    income = np.array(t["income"]).reshape(-1, 3)[:, 0]
    weights = np.array(t["weight"]).reshape(-1, 3)[:, 0]
    v = np.zeros_like(fare)
    v[:, 0] = (
        beta["asc_fast"] + beta["b_fare"] * fare[:, 0] + beta["b_minutes"] * np.log(minutes[:, 0])
    )
    v[:, 1] = (
        beta["asc_slow"]
        + beta["b_fare"] * fare[:, 1]
        + beta["b_minutes"] * np.log(minutes[:, 1])
        + beta["b_slow_income"] * income
    )
    return v, weights


def logit_shares(v: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """P_nj = exp(V_nj) / sum_k exp(V_nk) (Train 2009, eq. 3.6; from memory); shares by sample
    enumeration S_j = sum_n w_n P_nj / sum_n w_n (Train 2009, sec. 3.6.1; from memory)."""
    e = np.exp(v - v.max(axis=1, keepdims=True))
    p = e / e.sum(axis=1, keepdims=True)
    return weights @ p / weights.sum()


def publish(cli, files, version, coefficients=None, *extra):
    return cli(
        "publish",
        str(files["spec"]),
        "--coefficients",
        str(coefficients or files["coefficients"]),
        "--covariance",
        str(files["covariance"]),
        "--version",
        version,
        "--by",
        "ana",
        *extra,
    )
