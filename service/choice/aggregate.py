"""Weighted aggregation over a batch by sample enumeration (Train 2009, sec. 3.6.1, from memory).

Share_i = sum_n w_n P_ni / sum_n w_n;  aggregate elasticity
E_ij = sum_n w_n P_ni E_nij / sum_n w_n P_ni (0 where alternative i is never chosen with
positive probability).

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass(frozen=True, eq=False)
class AggregateResult:
    shares: np.ndarray
    """(J,)"""
    elasticities: dict[str, np.ndarray] = field(default_factory=dict)
    """By name: (J, J) for an attribute, (J,) for a context variable."""


def relative_weights(weights: np.ndarray) -> np.ndarray:
    """w / max(w).  Shares, aggregate elasticities and weighted means are ratios, unchanged by
    the scale of the weights; relative weights keep sum_n w_n from overflowing (weights near
    1e308) and keep subnormal weights (near 1e-320) from losing digits."""
    top = weights.max() if weights.size else 0.0
    return weights / top if top > 0 else weights


def weighted_mean(values: np.ndarray, weights: np.ndarray) -> float:
    """sum_n w_n x_n / sum_n w_n (N,), on relative weights."""
    w = relative_weights(weights)
    return float(values @ w / w.sum())


def shares(p: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Weighted shares from P (J, N), on relative weights."""
    w = relative_weights(weights)
    return p @ w / w.sum()


def aggregate_elasticity(p: np.ndarray, weights: np.ndarray, e: np.ndarray) -> np.ndarray:
    """From P (J, N) and E (J, J, N) or (J, N); probability-weighted mean over situations
    (on relative weights)."""
    wp = p * relative_weights(weights)
    denom = wp.sum(axis=1)
    num = np.einsum("ijn,in->ij", e, wp) if e.ndim == 3 else np.einsum("in,in->i", e, wp)
    safe = np.where(denom > 0, denom, 1.0)
    out = num / (safe[:, None] if e.ndim == 3 else safe)
    return np.where((denom > 0)[:, None] if e.ndim == 3 else denom > 0, out, 0.0)
