"""Systematic utilities and their derivatives, alternative-major: arrays are (J, N).

V_j = sum_t beta_t * t(x_j) * z  (Train 2009, sec. 3.1).  Alternative-major layout keeps
every per-alternative row contiguous, so reductions over alternatives are elementwise.

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

import numpy as np

from service.choice.batch import Batch
from service.choice.compiled import IDENTITY, LOG, NONE, CompiledModel, TermBlock

CHUNK_BYTES = 2**21
"""Rows of the attribute array are multiplied in blocks of about this size, so that each
block is read from memory once and then from cache for every alternative."""


def transform(code: int, x: np.ndarray) -> np.ndarray:
    """t(x) for identity / log / log1p.  Outside the domain (only ever in cells of an
    unavailable alternative, which check_batch leaves alone) the result is NaN/-inf and is
    masked by the caller, which runs this under ``np.errstate(divide="ignore",
    invalid="ignore")`` (one errstate per loop over terms, not one per term)."""
    if code == IDENTITY:
        return x
    return np.log(x) if code == LOG else np.log1p(x)


def transform_slope(code: int, x: np.ndarray) -> np.ndarray:
    """dt/dx: identity 1, log 1/x, log1p 1/(1+x)."""
    if code == IDENTITY:
        return np.ones_like(x)
    with np.errstate(divide="ignore", invalid="ignore"):
        return 1.0 / x if code == LOG else 1.0 / (1.0 + x)


def utilities(model: CompiledModel, batch: Batch) -> np.ndarray:
    """V (J, N), over cache-sized blocks of rows: the dense linear block is a stacked
    matrix-vector product (one per alternative), the general terms are the features of
    :class:`~service.choice.compiled.TermBlock` times their coefficients (another), and the
    constants are added last."""
    x, z = batch.attributes, batch.context
    n_j, n = len(model.alternatives), batch.size
    v = np.empty((n_j, n))
    weights, block = model.linear[:, :, None], model.general
    row_bytes = x.itemsize * n_j * max(x.shape[2], block.slots)
    step = max(256, CHUNK_BYTES // max(1, row_bytes))
    # Overflow gives an infinite or NaN utility, which choice_probabilities refuses by name.
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        for start in range(0, n, step):
            stop = min(n, start + step)
            np.matmul(x[start:stop].transpose(1, 0, 2), weights, out=v[:, start:stop, None])
            if block.slots:
                v[:, start:stop] += _general_terms(block, x[start:stop], z[start:stop])
    v += model.constants[:, None]
    return v


def _general_terms(block: TermBlock, x: np.ndarray, z: np.ndarray) -> np.ndarray:
    """sum_s weights[j, s] * F[n, j, s] (J, n) of a block of rows: F gathered from the cells,
    filled where a slot has no attribute, transformed, times its context variable.  Outside
    the domain (only in cells of an unavailable alternative, which check_batch leaves alone)
    a feature is NaN/-inf, confined to that alternative's utility and masked by the caller."""
    n = x.shape[0]
    if block.gathered:
        f = x.reshape(n, x.shape[1] * x.shape[2])[:, block.cells]
        np.copyto(f, block.fill, where=block.unfilled)
    else:
        f = np.repeat(block.fill[None, :], n, axis=0)
    if block.logged is not None:
        np.log(f, out=f, where=block.logged)
    if block.logged1p is not None:
        np.log1p(f, out=f, where=block.logged1p)
    if block.interacted is not None:
        np.multiply(f, z[:, block.context], out=f, where=block.interacted)
    features = f.reshape(n, -1, block.slots).transpose(1, 0, 2)
    return np.matmul(features, block.weights)[:, :, 0]


def _feature(
    term: tuple[int, int, int, int, int], x: np.ndarray, z: np.ndarray
) -> np.ndarray | float:
    """t(x_j[a]) * z[c] of one term (a row of ``TermArrays.rows``) over the batch (N,), or
    1.0 for a bare constant."""
    j, a, c, code, _ = term
    f: np.ndarray | float = 1.0
    if a != NONE:
        f = transform(code, x[:, j, a])
    if c != NONE:
        f = f * z[:, c]
    return f


def attribute_slopes(model: CompiledModel, batch: Batch, attribute: int) -> np.ndarray:
    """dV_j / dx_j[attribute] (J, N): sum over the alternative's terms on the attribute of
    beta * t'(x) * z (alternative-specific coefficients and transforms honoured)."""
    x, z = batch.attributes, batch.context
    terms = model.terms
    out = np.zeros((len(model.alternatives), batch.size))
    for t in np.flatnonzero(terms.attribute == attribute):
        j = terms.alternative[t]
        s = model.beta[terms.coefficient[t]] * transform_slope(
            int(terms.transform[t]), x[:, j, attribute]
        )
        if terms.context[t] != NONE:
            s = s * z[:, terms.context[t]]
        out[j] += s
    return out


def context_slopes(model: CompiledModel, batch: Batch, variable: int) -> np.ndarray:
    """dV_j / dz[variable] (J, N): sum over terms interacting with it of beta * t(x)."""
    x = batch.attributes
    terms = model.terms
    out = np.zeros((len(model.alternatives), batch.size))
    with np.errstate(divide="ignore", invalid="ignore"):
        for t in np.flatnonzero(terms.context == variable):
            j, a = terms.alternative[t], terms.attribute[t]
            f = 1.0 if a == NONE else transform(int(terms.transform[t]), x[:, j, a])
            out[j] += model.beta[terms.coefficient[t]] * f
    return out


def utility_design(model: CompiledModel, batch: Batch) -> np.ndarray:
    """dV_j / dbeta_k (K, J, N): the term features t(x) * z (V is linear in beta)."""
    x, z = batch.attributes, batch.context
    terms = model.terms
    out = np.zeros((len(model.beta), len(model.alternatives), batch.size))
    with np.errstate(divide="ignore", invalid="ignore"):
        for term in terms.rows:
            out[term[4], term[0]] += _feature(term, x, z)
    return out
