"""The pair-file spec: the nine keys that say which file to read and how, in one object.

The same :class:`PairFileSpec` travels from the config (``task=pairs``: ``task.path``,
``task.columns``, ...) or ``polopt data``'s flags to the reader (:func:`polopt.data.read_pair_file`),
unchanged on the way.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import asdict, dataclass, fields
from pathlib import Path


@dataclass(frozen=True)
class PairFileSpec:
    """Which preference-pair file to read and how.

    ``columns`` maps our fields (prompt, winner, loser, weight) to the file's columns (a dict,
    ``"prompt=question,..."`` or None for the defaults); ``max_length`` is in tokens of
    ``tokenizer`` (``"byte"`` or a local directory); ``truncation`` and ``duplicates`` are the
    policies of :mod:`polopt.data.validate`; ``hub`` lets a name that is not a local path be read
    from the hub; ``split`` picks a split of a saved dataset folder.
    """

    path: str | Path | None = None
    format: str = "auto"
    columns: Mapping | str | None = None
    max_length: int | None = None
    truncation: str = "reject"
    duplicates: str = "reject"
    tokenizer: str = "byte"
    hub: bool = False
    split: str = "train"

    @classmethod
    def from_config(cls, cfg: Mapping) -> PairFileSpec:
        """The spec from a mapping holding (some of) the nine keys; other keys (the rest of a
        ``task`` config) are ignored, an OmegaConf ``columns`` node becomes a dict."""
        values = {k: cfg[k] for k in KEYS if k in cfg}
        if isinstance(values.get("columns"), Mapping):
            values["columns"] = dict(values["columns"])
        return cls(**values)

    def as_dict(self) -> dict:
        return asdict(self)


KEYS = tuple(f.name for f in fields(PairFileSpec))
DEFAULTS = {f.name: f.default for f in fields(PairFileSpec)}
