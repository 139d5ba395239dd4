"""The package's own error and warning types.

Every problem a user can cause is a :class:`InputError`: its message is one line that
names the column, row, option or file at fault and says what would fix it. The CLI
prints it without a traceback and exits with status 2.
"""
from __future__ import annotations

import difflib
from collections.abc import Iterable


class RobustmodError(Exception):
    """Base class of every error the package raises on purpose."""


class InputError(RobustmodError, ValueError):
    """Bad input: data, formula, option or output location. One line, with a remedy."""

    def __init__(self, message: str) -> None:
        super().__init__(" ".join(str(message).split()))


class OptionError(InputError):
    """An option has a value outside its allowed range."""


def option_error(name: str, requirement: str, got: object, backend: str | None = None) -> OptionError:
    """The shared template: "The 'alpha' option must be a number in (0, 1); got 1.5.".

    With ``backend``: "The 'replications' option of back-end 'wild' must be …; got 12.".
    """
    owner = f" of back-end '{backend}'" if backend else ""
    return OptionError(f"The '{name}' option{owner} must be {requirement}; got {got!r}.")


def close_matches(name: str, candidates: Iterable[str], n: int = 3) -> str:
    """' Did you mean: a, b?' or '' when nothing is close."""
    found = difflib.get_close_matches(str(name), [str(c) for c in candidates], n=n, cutoff=0.5)
    if not found:
        lowered = {str(c).lower(): str(c) for c in candidates}
        if str(name).lower() in lowered:
            found = [lowered[str(name).lower()]]
    return f" Did you mean: {', '.join(repr(f) for f in found)}?" if found else ""
