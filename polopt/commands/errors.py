"""The one error boundary of every ``polopt`` command.

A user's mistake (a bad value or type, a config error, an unreadable or unwritable file, a broken
checkpoint, a loss that went non-finite) ends the command with ONE line on stderr,
``polopt CMD: error: ...``, and exit code 2. Anything else is a bug and keeps its traceback.
``POLOPT_DEBUG=1`` shows the traceback of user errors too. The commands themselves catch nothing:
they raise, and :func:`run_command` (called by the dispatcher) decides.

Hydra runs ``polopt train``'s function inside its own error handler, which prints its own report for
any :class:`Exception`; :class:`Escape` (a :class:`BaseException`) carries the error past it to here.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Callable


class Escape(BaseException):  # noqa: N818 (not an error itself: it carries one)
    """An error carried past a framework's own handler to :func:`run_command` (``.error``)."""

    def __init__(self, error: BaseException):
        super().__init__(str(error))
        self.error = error


def _is_config_error(err: BaseException) -> bool:
    """OmegaConf's and Hydra's config errors (by class, without importing them on the fast path); Hydra's
    instantiation error is not one: it wraps the builder's own error, judged by itself."""
    return type(err).__name__ != "InstantiationException" and any(
        cls.__module__.split(".")[0] in ("omegaconf", "hydra") and
        ("Config" in cls.__name__ or "Override" in cls.__name__ or "Missing" in cls.__name__ or
         "Validation" in cls.__name__ or "Interpolation" in cls.__name__) for cls in type(err).__mro__)


def user_error(err: BaseException) -> BaseException | None:
    """The user's mistake behind ``err`` (a wrapper such as Hydra's instantiation error unwrapped),
    or None for a bug that should keep its traceback."""
    from polopt.checkpoints.store import CheckpointError

    seen = err
    while True:
        if isinstance(seen, (ValueError, TypeError, FloatingPointError, CheckpointError, OSError)) or \
                _is_config_error(seen):
            return seen
        if seen.__cause__ is None:
            return None
        seen = seen.__cause__


def one_line(err: BaseException, os_hint: str = "") -> str:
    """The error as one line; a file-system error names the file and says why."""
    if isinstance(err, OSError) and err.strerror:
        text = f"{err.strerror}: {err.filename}" if err.filename else err.strerror
        return f"{text}; {os_hint}" if os_hint else text
    return " ".join(str(err).split()) or type(err).__name__


def run_command(name: str, main: Callable[[list[str]], int], argv: list[str], *, os_hint: str = "") -> int:
    """``main(argv)``'s exit code; a user error becomes one line and exit code 2 (see the module docstring)."""
    try:
        return main(argv)
    except Escape as escape:
        err = escape.error
    except Exception as caught:  # noqa: BLE001 (sorted below: user errors or bugs)
        err = caught
    cause = user_error(err)
    if cause is None or os.environ.get("POLOPT_DEBUG"):
        raise err
    print(f"polopt {name}: error: {one_line(cause, os_hint)}", file=sys.stderr)
    return 2
