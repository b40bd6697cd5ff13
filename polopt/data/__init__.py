"""Preference pairs from files: read, check, account for every row.

- :mod:`polopt.data.rows`: the column mapping, the reject record, the reason codes.
- :mod:`polopt.data.read`: JSONL / CSV / Parquet / saved folders (and the hub, opt-in) to raw rows.
- :mod:`polopt.data.validate`: the row checks, truncation, duplicates, the accounting.
- :mod:`polopt.data.report`: the summary text, the length histogram and plot, the rejects file.
- :mod:`polopt.commands.data`: ``polopt data FILE``.

The one call the trainer needs::

    data = load_pairs("pairs.jsonl", columns={"prompt": "question"}, max_length=512)
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

from polopt.data.read import FORMATS, RawTable, read_table
from polopt.data.report import histogram, plot_lengths, summary_text, write_rejects
from polopt.data.rows import FIELDS, REASONS, Columns, Reject
from polopt.data.validate import DUPLICATES, TRUNCATION, PairData, validate
from polopt.tokenizer import load_tokenizer

__all__ = ["DUPLICATES", "FIELDS", "FORMATS", "PAIR_FILE_KEYS", "REASONS", "TRUNCATION", "Columns", "PairData",
           "RawTable", "Reject", "histogram", "load_pairs", "load_pairs_from_config", "plot_lengths", "read_table",
           "summary_text", "validate", "write_rejects"]

# the config keys of a pair file (e.g. under task: in a task=pairs config), with their defaults
PAIR_FILE_KEYS = {"path": None, "format": "auto", "columns": None, "max_length": None, "truncation": "reject",
                  "duplicates": "reject", "tokenizer": "byte", "hub": False, "split": "train"}


def load_pairs(path: str | Path, *, columns: Mapping | str | Columns | None = None, format: str = "auto",
               max_length: int | None = None, truncation: str = "reject", duplicates: str = "reject",
               tokenizer=None, hub: bool = False, split: str = "train") -> PairData:
    """Read and check a preference-pair file; every row ends up accepted or rejected.

    ``columns`` maps our fields (prompt, winner, loser, weight) to the file's columns;
    ``max_length`` is in tokens of ``tokenizer`` (a tokenizer object, ``"byte"``, a local
    directory, or None for bytes); ``truncation`` one of :data:`TRUNCATION`; ``duplicates``
    one of :data:`DUPLICATES`; ``hub=True`` lets a name that is not a local path be read from
    the hub (never in tests). Returns :class:`PairData`.
    """
    if isinstance(tokenizer, (str, Path)) or tokenizer is None:
        tokenizer = load_tokenizer(tokenizer)
    cols = columns if isinstance(columns, Columns) else Columns.parse(columns)
    from polopt.data.validate import check_policies

    check_policies(max_length, truncation, duplicates)  # before reading a large file
    table = read_table(path, cols, format=format, hub=hub, split=split)
    return validate(table, tokenizer, max_length=max_length, truncation=truncation, duplicates=duplicates)


def load_pairs_from_config(cfg: Mapping, *, tokenizer=None) -> PairData:
    """:func:`load_pairs` from a mapping with the keys of :data:`PAIR_FILE_KEYS` (others are
    ignored, so a whole ``task`` config can be passed); ``tokenizer`` overrides ``cfg.tokenizer``."""
    values = {k: cfg.get(k, default) for k, default in PAIR_FILE_KEYS.items()}
    if values["path"] is None:
        raise ValueError("path must name a pair file (JSONL, CSV, Parquet or a saved dataset folder), got None")
    columns = values["columns"]
    columns = dict(columns) if isinstance(columns, Mapping) else columns  # an OmegaConf node becomes a dict
    return load_pairs(values["path"], columns=columns, format=values["format"], max_length=values["max_length"],
                      truncation=values["truncation"], duplicates=values["duplicates"],
                      tokenizer=tokenizer or values["tokenizer"], hub=bool(values["hub"]), split=values["split"])
