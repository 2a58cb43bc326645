"""The long table layout of choice situations, converted to a :class:`Batch` without a
per-row Python loop.

One row per (situation, alternative) offered:

- ``situation``: the situation id (any non-null type); rows of a situation need not be
  adjacent; situations keep their order of first appearance;
- ``alternative``: an alternative id of the model (string);
- one float column per attribute of the model (null where the alternative does not use it);
- ``available`` (optional, bool): false keeps the row but makes the alternative unavailable;
  an alternative with no row in a situation is unavailable there;
- one column per context variable and an optional ``weight``, each constant within a
  situation.

Used for population files (CSV or Parquet) and for Arrow IPC request bodies.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from service.choice import Batch, CompiledModel

MAX_REPORTED = 100
"""At most this many problems are listed; a final entry counts the rest."""
RESERVED = ("situation", "alternative", "available", "weight")


@dataclass(frozen=True)
class RowProblem:
    """A bad value of a table: 0-based ``row`` (-1: the table as a whole) and ``column``."""

    row: int
    column: str
    message: str

    def as_dict(self) -> dict[str, object]:
        return {"row": self.row, "column": self.column, "message": self.message}


class _Problems:
    def __init__(self) -> None:
        self.items: list[RowProblem] = []
        self.count = 0

    def rows(self, mask: np.ndarray, column: str, message: str) -> None:
        rows = np.flatnonzero(mask)
        self.count += len(rows)
        room = max(0, MAX_REPORTED - len(self.items))
        self.items += [RowProblem(int(r), column, message) for r in rows[:room]]

    def whole(self, column: str, message: str) -> None:
        self.count += 1
        if len(self.items) < MAX_REPORTED:
            self.items.append(RowProblem(-1, column, message))

    def result(self) -> tuple[RowProblem, ...]:
        items = sorted(self.items, key=lambda p: p.row)
        if self.count > len(items):
            items.append(RowProblem(-1, "", f"{self.count - len(items)} more problems not listed"))
        return tuple(items)


def _floats(
    table: pa.Table, name: str, problems: _Problems
) -> tuple[np.ndarray, np.ndarray] | None:
    """(values with NaN for nulls, null mask) of a numeric column; None if not numeric."""
    column = table.column(name)
    numeric = pa.types.is_floating(column.type) or pa.types.is_integer(column.type)
    if not (numeric or pa.types.is_null(column.type)):
        problems.whole(name, f"must be a numeric column, not {column.type}")
        return None
    column = column.cast(pa.float64())
    nulls = column.is_null().to_numpy(zero_copy_only=False)
    values = column.fill_null(np.nan).to_numpy()
    return np.asarray(values, dtype=np.float64), np.asarray(nulls, dtype=bool)


def _per_situation(
    values: np.ndarray,
    nulls: np.ndarray,
    sit: np.ndarray,
    n: int,
    first: np.ndarray,
    column: str,
    problems: _Problems,
) -> np.ndarray:
    """A column constant within each situation, as (N,); refuses rows that differ."""
    out = np.full(n, np.nan)
    out[sit[first]] = values[first]
    same = (values == out[sit]) | (np.isnan(values) & np.isnan(out[sit]))
    problems.rows(~same, column, "must be constant within a situation")
    problems.rows(nulls, column, "is null")
    return out


def batch_from_table(
    model: CompiledModel, table: pa.Table
) -> tuple[pa.Array, Batch, tuple[RowProblem, ...]]:
    """Convert a long table to (situation ids, batch, problems).

    Situation ids are a pyarrow array in batch order. The batch is filled whatever the
    problems (bad cells NaN); refuse the input when ``problems`` is non-empty, else pass the
    batch to :func:`~service.choice.check_batch` for the value checks (finite, log domain,
    ranges), whose situation indices index the returned ids.
    """
    problems = _Problems()
    n_j, n_a, n_c = len(model.alternatives), len(model.attributes), len(model.context)
    known = set(RESERVED) | set(model.attributes) | set(model.context)
    for name in table.column_names:
        if name not in known:
            problems.whole(name, "unknown column (not an attribute or context variable)")
    if len(set(table.column_names)) != len(table.column_names):
        problems.whole("", "duplicate column names")
    for name in ("situation", "alternative"):
        if name not in table.column_names:
            problems.whole(name, "required column is missing")
    for name in model.required_context:
        if name not in table.column_names:
            problems.whole(name, "context variable the model uses: column is missing")
    for alt, attr in model.required_attributes:
        if attr not in table.column_names:
            problems.whole(attr, f"attribute {alt!r} uses: column is missing")
    empty = Batch(
        attributes=np.zeros((0, n_j, n_a)),
        context=np.zeros((0, n_c)),
        available=np.zeros((0, n_j), dtype=bool),
        weights=np.zeros(0),
    )
    if problems.count:
        return pa.array([], pa.null()), empty, problems.result()
    rows = len(table)

    sit_col = table.column("situation").combine_chunks()
    problems.rows(sit_col.is_null().to_numpy(zero_copy_only=False), "situation", "is null")
    encoded = pc.dictionary_encode(sit_col)
    ids = encoded.dictionary
    sit = encoded.indices.fill_null(0).to_numpy().astype(np.intp)
    n = len(ids)

    alt_col = table.column("alternative").combine_chunks()
    if not (pa.types.is_string(alt_col.type) or pa.types.is_large_string(alt_col.type)):
        alt_col = alt_col.cast(pa.string()) if pa.types.is_dictionary(alt_col.type) else alt_col
    alt_encoded = pc.dictionary_encode(alt_col)
    names = alt_encoded.dictionary.to_pylist()
    lookup = np.array(
        [model.alternatives.index(a) if a in model.alternatives else -1 for a in names] or [-1]
    )
    alt = lookup[alt_encoded.indices.fill_null(0).to_numpy().astype(np.intp)]
    alt_nulls = alt_col.is_null().to_numpy(zero_copy_only=False)
    problems.rows(alt_nulls, "alternative", "is null")
    problems.rows((alt < 0) & ~alt_nulls, "alternative", "not an alternative of the model")
    good = (alt >= 0) & ~alt_nulls

    cell = sit * n_j + np.where(good, alt, 0)
    order = np.argsort(cell, kind="stable")
    sorted_cells = cell[order]
    repeat = np.zeros(rows, dtype=bool)
    repeat[order[1:]] = (sorted_cells[1:] == sorted_cells[:-1]) & good[order[1:]]
    problems.rows(repeat, "alternative", "appears twice in the same situation")

    available_row = np.ones(rows, dtype=bool)
    if "available" in table.column_names:
        col = table.column("available")
        if not pa.types.is_boolean(col.type):
            problems.whole("available", f"must be a boolean column, not {col.type}")
        else:
            nulls = col.is_null().to_numpy(zero_copy_only=False)
            problems.rows(nulls, "available", "is null")
            available_row = col.fill_null(False).to_numpy(zero_copy_only=False).astype(bool)

    use = good & ~repeat
    r_sit, r_alt = sit[use], alt[use]
    available = np.zeros((n, n_j), dtype=bool)
    available[r_sit, r_alt] = available_row[use]

    x = np.where(model.required, np.nan, 0.0)[None].repeat(n, axis=0)
    for a, attr in enumerate(model.attributes):
        if attr not in table.column_names:
            continue
        floats = _floats(table, attr, problems)
        if floats is None:
            continue
        values, nulls = floats
        needed = model.required[np.where(good, alt, 0), a] & good & available_row
        problems.rows(needed & nulls, attr, f"is null but the alternative uses {attr}")
        problems.rows(needed & ~nulls & ~np.isfinite(values), attr, "must be a finite number")
        x[r_sit, r_alt, a] = np.where(model.required[r_alt, a], values[use], 0.0)

    first = np.zeros(rows, dtype=bool)
    first[np.unique(sit, return_index=True)[1]] = True
    z = np.where(model.required_context_mask, np.nan, 0.0)[None].repeat(n, axis=0)
    for c, name in enumerate(model.context):
        if name not in table.column_names:
            continue
        if not model.required_context_mask[c]:
            continue  # an unused column is ignored (its cells stay 0)
        floats = _floats(table, name, problems)
        if floats is not None:
            z[:, c] = _per_situation(*floats, sit, n, first, name, problems)
    weights = np.ones(n)
    if "weight" in table.column_names:
        floats = _floats(table, "weight", problems)
        if floats is not None:
            weights = _per_situation(*floats, sit, n, first, "weight", problems)
    batch = Batch(attributes=x, context=z, available=available, weights=weights)
    return ids, batch, problems.result()


def read_table(path: str | Path) -> pa.Table:
    """Read a population file: Parquet (``.parquet``/``.pq``) or CSV (anything else).

    Raises ``ValueError`` naming the file when it cannot be read.
    """
    import pyarrow.csv as pcsv
    import pyarrow.parquet as pq

    path = Path(path)
    try:
        if path.suffix.lower() in (".parquet", ".pq"):
            return pq.read_table(path)
        return pcsv.read_csv(path)
    except FileNotFoundError:
        raise ValueError(f"population: file {str(path)!r} not found") from None
    except (pa.ArrowException, OSError) as exc:
        raise ValueError(f"population: cannot read {str(path)!r}: {exc}") from None
