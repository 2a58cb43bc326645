"""What every request decoder returns: situation ids, the batch, and located problems."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

from service.choice import Batch, BatchCheck, BatchProblem
from service.choice.checks import MAX_REPORTED

from ..problems import FieldError

Locate = Callable[[BatchProblem], str]
Absent = Callable[[BatchProblem], bool]
MISSING = "is required: the model uses it"


def never_absent(p: BatchProblem) -> bool:
    return False


@dataclass(frozen=True, eq=False)
class Decoded:
    ids: Sequence[str]
    batch: Batch
    problems: tuple[FieldError, ...]
    """Problems found while decoding (unknown names, wrong types), already located."""
    locate: Locate
    """Turns a core ``BatchProblem`` into the path of its field in this request form."""
    form: str
    """``rows``, ``columns`` or ``arrow``."""
    absent: Absent = never_absent
    """Whether a problem's value was left out of the request (not given as non-finite)."""
    undecoded: frozenset[str] = frozenset()
    """Arrow: the columns with a value that failed to decode. The check's findings on those
    fields are not listed (they would repeat the decoding problem under another name)."""

    def errors(self, problems: Sequence[BatchProblem]) -> list[FieldError]:
        return [
            FieldError(self.locate(p), MISSING if self.absent(p) else p.message) for p in problems
        ]

    def refusals(self, check: BatchCheck) -> tuple[list[FieldError], int]:
        """The problems to list (decoding problems, then the check's problems of fields not
        already named: a value that failed to decode is not reported again as missing), at
        most :data:`MAX_REPORTED`, and how many distinct problems there are in all."""
        if self.problems and self.batch.size == 0:
            return list(self.problems[:MAX_REPORTED]), len(self.problems)
        named = tuple(e.path for e in self.problems)
        shown = [p for p in check.problems if not (p.field and p.field[-1] in self.undecoded)]
        found = self.errors(shown)
        later = [e for e in found if not e.path.startswith(named)]
        hidden = len(check.problems) - len(later)
        count = len(self.problems) + check.problem_count - hidden
        return [*self.problems, *later][:MAX_REPORTED], count


def rows_locator(root: str) -> Locate:
    """``$.situations[3].attributes.bus.fare`` (``root`` is ``$.situations``); a finding about
    the batch as a whole is ``$.situations`` or ``$.situations[*].weight``."""

    def locate(p: BatchProblem) -> str:
        if p.situation < 0:
            fields = [f for f in p.field if f != "situations"]
            return root + ("[*]" + "".join(f".{f}" for f in fields) if fields else "")
        return f"{root}[{p.situation}]" + "".join(f".{f}" for f in p.field)

    return locate


def columns_locator(root: str) -> Locate:
    """``$.columns.attributes.bus.fare[3]`` (``root`` is ``$.columns``); a finding about the
    batch as a whole is ``$.columns`` or ``$.columns.weight``."""

    def locate(p: BatchProblem) -> str:
        path = root + "".join(f".{f}" for f in p.field if f != "situations")
        return path if p.situation < 0 else f"{path}[{p.situation}]"

    return locate
