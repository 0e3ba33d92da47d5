"""Errors the user can act on.

Every problem with user input (a scene file, a processor spec, a command-line value, a
reference set) is raised as :class:`InputError` or a subclass. The message names the
file, the key path (``sources[2].power_db``), the offending value and what is allowed.
The command line prints the message alone and exits with code 2; it never shows a
traceback for these.
"""
from __future__ import annotations

import difflib
import reprlib
from typing import Any, Iterable

#: exit code for bad input or usage (documented in README)
EXIT_USAGE = 2


_REPR = reprlib.Repr()
_REPR.maxlevel, _REPR.maxstring, _REPR.maxother = 3, 100, 100
_REPR.maxlist = _REPR.maxtuple = _REPR.maxdict = _REPR.maxset = 8


def _show(value: Any, limit: int = 80) -> str:
    """Short repr of a user's value: bounded work whatever its size (nested containers
    are abbreviated, so an alias bomb or a recursive list prints in microseconds)."""
    try:
        text = _REPR.repr(value) if isinstance(value, (list, tuple, dict, set)) else repr(value)
    except ValueError:            # an int too long for str() (Python's digit limit)
        text = "an integer of more than 4300 digits"
    if len(text) > limit:
        text = text[: limit - 3] + "..."
    return text


def _clip(text: str, limit: int) -> str:
    """``text`` shortened in the middle to at most ``limit`` characters (a user's key of
    10,000 characters must not make a 10,000-character message)."""
    if len(text) <= limit:
        return text
    half = (limit - 5) // 2
    return f"{text[:half]} ... {text[-half:]}"


def _one_line(text: str) -> str:
    """Escape control characters (line breaks, tabs, NUL...) so a message stays on one
    line whatever text the user's keys or values hold."""
    if text.isprintable():
        return text
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


def did_you_mean(word: str, choices: Iterable[str]) -> str:
    """Return ``" (did you mean 'x'?)"`` for the closest choice, or ``""``."""
    close = difflib.get_close_matches(str(word), list(choices), n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


class InputError(ValueError):
    """Bad user input: one clear message, exit code 2 on the command line.

    Parameters
    ----------
    message : what is wrong, in plain words.
    file : the file the input came from, if any.
    path : the key path inside it, e.g. ``sources[2].power_db``.
    value : the offending value (shown with ``repr``, shortened).
    allowed : what would have been accepted.
    """

    exit_code = EXIT_USAGE
    _NOVALUE = object()

    def __init__(self, message: str, *, file: str | None = None, path: str | None = None,
                 value: Any = _NOVALUE, allowed: str | None = None):
        self.message = message
        self.file = file
        self.path = path
        self.value = value
        self.allowed = allowed
        super().__init__(self.render())

    def render(self) -> str:
        where = []
        if self.file:
            where.append(_clip(str(self.file), 300))
        if self.path:
            where.append(_clip(str(self.path), 120))
        text = (": ".join(where) + ": " if where else "") + _clip(str(self.message), 400)
        if self.value is not InputError._NOVALUE:
            text += f" (got {_show(self.value)})"
        if self.allowed:
            text += f"; allowed: {_clip(str(self.allowed), 400)}"
        return _one_line(text)

    def at(self, *, file: str | None = None, path_prefix: str | None = None) -> "InputError":
        """Return a copy located in ``file`` and/or under ``path_prefix``."""
        path = self.path
        if path_prefix:
            path = path_prefix if not path else (
                f"{path_prefix}{path}" if path.startswith("[") else f"{path_prefix}.{path}")
        return type(self)(self.message, file=file or self.file, path=path,
                          value=self.value, allowed=self.allowed)

    def __str__(self) -> str:  # keep str() in step with later .at() relocations
        return self.render()


class SceneError(InputError):
    """A scene file is invalid."""


class SpecError(InputError):
    """A processor spec (method name or parameter) is invalid."""


class CorruptReferenceError(InputError):
    """A reference set is missing, corrupt or does not match its manifest."""
