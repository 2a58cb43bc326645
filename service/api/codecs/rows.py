"""The per-situation JSON form: ``{"situations": [{"id", "attributes", "context", ...}]}``."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from service.choice import Batch, BatchProblem

from ..problems import FieldError
from .decoded import Decoded, rows_locator

ROOT = "$.situations"
LOCATE = rows_locator(ROOT)


def decode_rows(model: Any, situations: Sequence[dict[str, Any]]) -> Decoded:
    """Situations (already shape-checked by the envelope schema) into a batch.

    Unknown alternatives/attributes and values of the wrong type come back as problems; missing
    or non-finite values the model uses are left NaN for ``check_batch`` to report.
    """
    ids = [str(s.get("id", i)) if isinstance(s, dict) else str(i) for i, s in enumerate(situations)]
    batch, problems = Batch.from_records(model, situations)

    errors = tuple(FieldError(LOCATE(p), p.message) for p in problems)

    def absent(p: BatchProblem) -> bool:
        """A used attribute or context value left out of its situation."""
        if p.situation < 0 or p.field[:1] not in (("attributes",), ("context",)):
            return False
        node: Any = situations[p.situation]
        for key in p.field:
            if not isinstance(node, dict) or key not in node:
                return True
            node = node[key]
        return False

    return Decoded(ids=ids, batch=batch, problems=errors, locate=LOCATE, form="rows", absent=absent)
