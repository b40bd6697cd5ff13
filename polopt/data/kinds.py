"""Which kind of row a file holds (pairs, unpaired, ranking, scored), inferred from its columns and rows.

A kind is *complete* in a file when every one of its columns (:data:`polopt.data.rows.KINDS`, after the
``task.columns`` mapping) is among the file's columns; columns of no complete kind are extra and ignored,
as any other column is. The file's kind is then:

- the one complete kind, where there is one (a pair file with an extra ``label`` column stays a pair file);
- where several are complete (a file made of files of several kinds, or a table with a column per field of
  each), the kind whose fields every row fills (not null, not empty): a row filling the fields of two
  kinds, or two rows of different kinds, refuse the file in one line naming the rows and both kinds (a
  file holds one kind of row; split it). Rows that fill no kind completely are left to the checks, which
  reject them (``missing``) under the file's kind;
- None where no kind is complete: the reader then names the columns a pair file lacks.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable

from polopt.data.rows import KINDS, Columns


def describe(kind: str) -> str:
    """``ranking (responses + ranking)``: a kind with its fields, for messages and reports."""
    return f"{kind} ({' + '.join(KINDS[kind])})"


def require_pairs(kind: str, what: str) -> None:
    """One ValueError where a file of ``kind`` rows reaches ``what``, which reads pair rows only."""
    if kind != "pairs":
        raise ValueError(f"{what} reads pair rows (prompt, winner, loser); this file holds {describe(kind)} rows")


def complete_kinds(found: Iterable[str], columns: Columns) -> list[str]:
    """The kinds whose columns all appear among ``found`` (the file's columns), in :data:`KINDS` order."""
    found = set(found)
    return [k for k, own in KINDS.items() if all(columns.column(f) in found for f in ("prompt", *own))]


def _filled(value) -> bool:
    return value is not None and value != ""


def infer_kind(found: Iterable[str], rows: Iterable[tuple[int, Callable[[str], object]]], columns: Columns, *,
               unit: str, source: str) -> str | None:
    """The kind of the file (see the module docstring) from its columns ``found`` and its ``rows``, pairs of
    (location, ``get(column) -> value or None``); a ValueError for a file mixing kinds."""
    kinds = complete_kinds(found, columns)
    if len(kinds) <= 1:
        return kinds[0] if kinds else None
    first = None
    for location, get in rows:
        filled = [k for k in kinds if all(_filled(get(columns.column(f))) for f in KINDS[k])]
        if len(filled) > 1:
            raise ValueError(f"{source}: {unit} {location} fills the fields of two kinds of row, {describe(filled[0])} "
                             f"and {describe(filled[1])}; a file holds one kind of row: split it into one file per "
                             "kind, or map the fields of the kind you mean with task.columns")
        if not filled:
            continue
        if first is None:
            first = (location, filled[0])
        elif filled[0] != first[1]:
            raise ValueError(f"{source}: {unit} {location} is a {describe(filled[0])} row but {unit} {first[0]} is a "
                             f"{describe(first[1])} row; a file holds one kind of row: split it into one file per "
                             "kind")
    return kinds[0] if first is None else first[1]
