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
) -> tuple[np.ndarray, np.ndarray | None] | None:
    """(values with NaN for nulls, null mask or None if no nulls) of a numeric column;
    None if the column is not numeric."""
    column = table.column(name)
    numeric = pa.types.is_floating(column.type) or pa.types.is_integer(column.type)
    if not (numeric or pa.types.is_null(column.type)):
        problems.whole(name, f"must be a numeric column, not {column.type}")
        return None
    column = column.cast(pa.float64()) if column.type != pa.float64() else column
    if column.null_count == 0:
        return column.to_numpy(), None
    nulls = column.is_null().to_numpy(zero_copy_only=False)
    values = column.fill_null(np.nan).to_numpy()
    return np.asarray(values, dtype=np.float64), np.asarray(nulls, dtype=bool)


def _per_situation(
    values: np.ndarray,
    nulls: np.ndarray | None,
    sit: np.ndarray,
    n: int,
    first: np.ndarray,
    column: str,
    problems: _Problems,
) -> np.ndarray:
    """A column constant within each situation, as (N,); refuses rows that differ."""
    out = np.full(n, np.nan)
    out[sit[first]] = values[first]
    spread = out[sit]
    same = (values == spread) | (np.isnan(values) & np.isnan(spread))
    problems.rows(~same, column, "must be constant within a situation")
    if nulls is not None:
        problems.rows(nulls, column, "is null")
    return out


def _situations(column: pa.Array, problems: _Problems) -> tuple[pa.Array, np.ndarray]:
    """(distinct ids in order of first appearance, situation index of every row)."""
    nulls = column.is_null().to_numpy(zero_copy_only=False)
    problems.rows(nulls, "situation", "is null")
    if pa.types.is_integer(column.type) and not nulls.any() and len(column):
        values = column.to_numpy()
        if bool(np.all(values[1:] >= values[:-1])):  # grouped and sorted: no hashing needed
            starts = np.r_[True, values[1:] != values[:-1]]
            return pa.array(values[starts], column.type), np.cumsum(starts) - 1
    encoded = pc.dictionary_encode(column)
    return encoded.dictionary, encoded.indices.fill_null(0).to_numpy().astype(np.intp)


def _complete_batch(
    model: CompiledModel, table: pa.Table, n: int, available_row: np.ndarray, problems: _Problems
) -> Batch:
    """The batch of a complete, ordered table: every column reshapes to (N, J) in place."""
    n_j = len(model.alternatives)
    available = available_row.reshape(n, n_j).copy()
    x = model.unset_values[0][None].repeat(n, axis=0)
    for a, attr in enumerate(model.attributes):
        if attr not in table.column_names:
            continue
        floats = _floats(table, attr, problems)
        if floats is None:
            continue
        values, nulls = floats
        grid = values.reshape(n, n_j)
        needed = (model.required[:, a][None, :] & available).reshape(-1)
        bad = ~np.isfinite(values) & needed
        if nulls is not None:
            problems.rows(needed & nulls, attr, f"is null but the alternative uses {attr}")
            bad &= ~nulls
        problems.rows(bad, attr, "must be a finite number")
        used = model.required[:, a]
        x[:, :, a] = grid if used.all() else np.where(used, grid, 0.0)

    def per_situation(name: str) -> np.ndarray | None:
        floats = _floats(table, name, problems)
        if floats is None:
            return None
        values, nulls = floats
        grid = values.reshape(n, n_j)
        head = grid[:, :1]
        same = (grid == head) | (np.isnan(grid) & np.isnan(head))
        problems.rows(~same.reshape(-1), name, "must be constant within a situation")
        if nulls is not None:
            problems.rows(nulls, name, "is null")
        return grid[:, 0].copy()

    z = model.unset_values[1][None].repeat(n, axis=0)
    for c, name in enumerate(model.context):
        if name in table.column_names and model.required_context_mask[c]:
            column = per_situation(name)
            if column is not None:
                z[:, c] = column
    weights = np.ones(n)
    if "weight" in table.column_names:
        column = per_situation("weight")
        if column is not None:
            weights = column
    return Batch(attributes=x, context=z, available=available, weights=weights)


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
            problems.whole(attr, f"alternative {alt!r} uses attribute {attr!r}: column is missing")
    empty = Batch(
        attributes=np.zeros((0, n_j, n_a)),
        context=np.zeros((0, n_c)),
        available=np.zeros((0, n_j), dtype=bool),
        weights=np.zeros(0),
    )
    if problems.count:
        return pa.array([], pa.null()), empty, problems.result()
    rows = len(table)

    ids, sit = _situations(table.column("situation").combine_chunks(), problems)
    n = len(ids)

    alt_col = table.column("alternative").combine_chunks()
    if pa.types.is_dictionary(alt_col.type):
        alt_col = alt_col.cast(pa.string())
    alt_nulls = alt_col.is_null().to_numpy(zero_copy_only=False)
    try:
        found = pc.index_in(alt_col, value_set=pa.array(model.alternatives, alt_col.type))
        alt = found.fill_null(-1).to_numpy().astype(np.intp)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError):
        problems.whole("alternative", f"must be a string column, not {alt_col.type}")
        return pa.array([], pa.null()), empty, problems.result()
    problems.rows(alt_nulls, "alternative", "is null")
    problems.rows((alt < 0) & ~alt_nulls, "alternative", "not an alternative of the model")
    good = alt >= 0
    alt_or_0 = np.where(good, alt, 0)

    # Duplicates and a reference row per situation; the common layout (rows grouped by
    # situation, alternatives in model order) is recognised in O(rows) without sorting.
    cell = sit * n_j + alt_or_0
    repeat = np.zeros(rows, dtype=bool)
    ordered = bool(rows and good.all() and np.all(cell[1:] > cell[:-1]))
    complete = ordered and rows == n * n_j
    """Every situation offers every alternative, in model order: row r is cell r."""
    if ordered:
        first = np.r_[True, sit[1:] != sit[:-1]]
    else:
        order = np.argsort(cell, kind="stable")
        sorted_cells, sorted_sit = cell[order], sit[order]
        repeat[order[1:]] = (sorted_cells[1:] == sorted_cells[:-1]) & good[order[1:]]
        first = np.zeros(rows, dtype=bool)
        first[order[np.r_[True, sorted_sit[1:] != sorted_sit[:-1]]] if rows else []] = True
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

    if complete:
        return ids, _complete_batch(model, table, n, available_row, problems), problems.result()

    use = good & ~repeat
    every = bool(use.all())
    r_alt = alt if every else alt[use]
    r_cell = cell if every else cell[use]
    available = np.zeros((n, n_j), dtype=bool)
    available.reshape(-1)[r_cell] = available_row if every else available_row[use]

    x = model.unset_values[0][None].repeat(n, axis=0)
    flat_x = x.reshape(-1)
    for a, attr in enumerate(model.attributes):
        if attr not in table.column_names:
            continue
        floats = _floats(table, attr, problems)
        if floats is None:
            continue
        values, nulls = floats
        needed = model.required[alt_or_0, a] & good & available_row
        bad = ~np.isfinite(values) & needed
        if nulls is not None:
            problems.rows(needed & nulls, attr, f"is null but the alternative uses {attr}")
            bad &= ~nulls
        problems.rows(bad, attr, "must be a finite number")
        used = model.required[r_alt, a]
        picked = values if every else values[use]
        flat_x[r_cell * n_a + a] = picked if used.all() else np.where(used, picked, 0.0)

    z = model.unset_values[1][None].repeat(n, axis=0)
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
