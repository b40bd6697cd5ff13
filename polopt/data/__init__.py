"""Preference data from files (pairs, unpaired, ranking and scored rows): read, check, account for every row.

- :mod:`polopt.data.spec`: :class:`PairFileSpec`, the nine keys saying which file and how to read it.
- :mod:`polopt.data.rows`: the column mapping, the reject record, the reason codes.
- :mod:`polopt.data.read`: JSONL / CSV / Parquet / saved folders (and the hub, opt-in) to raw rows.
- :mod:`polopt.data.kinds`: which kind of row a file holds (pairs, unpaired, ranking, scored).
- :mod:`polopt.data.validate`: the row checks, truncation, duplicates, the accounting (pairs);
  :mod:`polopt.data.group_rows` the same for the other kinds.
- :mod:`polopt.data.report`: the summary text, the length histogram and plot, the rejects file.
- :mod:`polopt.commands.data`: ``polopt data FILE``.

The one call the trainer needs (``load_pairs(path, **keys)`` builds the spec from keywords)::

    data = read_pair_file(PairFileSpec("pairs.jsonl", columns={"prompt": "question"}, max_length=512))
    data.prompt, data.winner, data.loser, data.weight   # accepted pairs, parallel lists
    data.to_dataset()                                   # the same as a datasets.Dataset
    data.accounting                                     # counts for summary.json
    write_rejects(data.rejects, run_dir / "rejects.jsonl")

A problem with the file as a whole is one ``ValueError``; a problem with a row
is a reject, never an exception.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

from polopt.data.group_rows import validate_groups
from polopt.data.read import FORMATS, RawTable, read_table
from polopt.data.report import histogram, plot_lengths, summary_text, write_rejects
from polopt.data.rows import FIELDS, KINDS, REASONS, Columns, Reject
from polopt.data.spec import DEFAULTS, PairFileSpec
from polopt.data.tokenizer import load_tokenizer
from polopt.data.validate import DUPLICATES, TRUNCATION, PairData, check_policies, validate

__all__ = ["DUPLICATES", "FIELDS", "FORMATS", "KINDS", "PAIR_FILE_KEYS", "REASONS", "TRUNCATION", "Columns", "PairData",
           "PairFileSpec", "RawTable", "Reject", "histogram", "load_pairs", "load_pairs_from_config", "plot_lengths",
           "read_pair_file", "read_table", "summary_text", "validate", "validate_rows", "write_rejects"]

# the config keys of a pair file (e.g. under task: in a task=pairs config), with their defaults
PAIR_FILE_KEYS = DEFAULTS


def read_pair_file(spec: PairFileSpec, *, tokenizer=None, messages: bool = False) -> PairData:
    """Read and check the preference-pair file ``spec`` names; every row ends up accepted or rejected.

    ``tokenizer``: a tokenizer object to measure lengths with (default: ``spec.tokenizer`` loaded,
    ``"byte"`` or a local directory). ``messages``: prompts and responses may be chat message lists
    (:mod:`polopt.data.chat`). A problem with the file as a whole is one ValueError;
    ``hub=True`` lets a name that is not a local path be read from the hub (never in tests).
    """
    if spec.path is None:
        raise ValueError("path must name a pair file (JSONL, CSV, Parquet or a saved dataset folder), got None")
    if tokenizer is None or isinstance(tokenizer, (str, Path)):
        tokenizer = load_tokenizer(tokenizer or spec.tokenizer)
    cols = spec.columns if isinstance(spec.columns, Columns) else Columns.parse(spec.columns)
    check_policies(spec.max_length, spec.truncation, spec.duplicates)  # before reading a large file
    table = read_table(spec.path, cols, format=spec.format, hub=bool(spec.hub), split=spec.split)
    return validate_rows(table, tokenizer, max_length=spec.max_length, truncation=spec.truncation,
                         duplicates=spec.duplicates, messages=messages)


def validate_rows(table: RawTable, tokenizer, **keys) -> PairData:
    """The checks of the table's kind of row: :func:`validate` for pairs, :func:`validate_groups` for the
    other kinds (``keys``: max_length, truncation, duplicates, messages)."""
    return (validate if table.kind == "pairs" else validate_groups)(table, tokenizer, **keys)


def load_pairs(path: str | Path, *, columns: Mapping | str | Columns | None = None, format: str = "auto",
               max_length: int | None = None, truncation: str = "reject", duplicates: str = "reject",
               tokenizer=None, hub: bool = False, split: str = "train") -> PairData:
    """:func:`read_pair_file` of the spec these keywords make (``tokenizer`` None: bytes)."""
    spec = PairFileSpec(path, format=format, columns=columns, max_length=max_length, truncation=truncation,
                        duplicates=duplicates, hub=hub, split=split)
    return read_pair_file(spec, tokenizer=tokenizer if tokenizer is not None else "byte")


def load_pairs_from_config(cfg: Mapping, *, tokenizer=None) -> PairData:
    """:func:`read_pair_file` of :meth:`PairFileSpec.from_config` (keys other than the nine are
    ignored, so a whole ``task`` config can be passed); ``tokenizer`` overrides ``cfg.tokenizer``."""
    return read_pair_file(PairFileSpec.from_config(cfg), tokenizer=tokenizer)
