"""The one error type for bad user input.

Every problem found in a robot file, scenario file, command log or trace is
raised as :class:`InputError`.  The command line turns it into
``file:line: message`` and exit code 2; library users can catch it.
"""
from __future__ import annotations


class InputError(Exception):
    """Bad user input, located in a file.

    Parameters
    ----------
    source : str or None
        File name as the user gave it (or ``"<inline>"``).
    line : int or None
        1-based line number, when known.
    message : str
        What is wrong and what is allowed.
    """

    def __init__(self, source: str | None, line: int | None, message: str):
        self.source = source
        self.line = line
        self.message = message
        super().__init__(str(self))

    def __str__(self) -> str:
        where = self.source or "<input>"
        if self.line is not None:
            where = f"{where}:{self.line}"
        return f"{where}: {self.message}"


class InputWarning:
    """Something in a file that is allowed but probably not meant (a plausibility warning).

    Printed as ``file:line: warning: message``; it never changes an exit code.
    Equal warnings (same source, line and message) compare equal, so a file
    read twice warns once.
    """

    __slots__ = ("source", "line", "message")

    def __init__(self, source: str | None, line: int | None, message: str):
        self.source = source
        self.line = line
        self.message = message

    def _key(self):
        return (self.source, self.line, self.message)

    def __eq__(self, other):
        return isinstance(other, InputWarning) and self._key() == other._key()

    def __hash__(self):
        return hash(self._key())

    def __repr__(self):
        return f"InputWarning({self.source!r}, {self.line!r}, {self.message!r})"

    def __str__(self) -> str:
        where = self.source or "<input>"
        if self.line is not None:
            where = f"{where}:{self.line}"
        return f"{where}: warning: {self.message}"


def require(module: str, purpose: str) -> None:
    """Raise :class:`InputError` unless ``module`` can be imported (an optional extra)."""
    import importlib.util
    if importlib.util.find_spec(module) is None:
        raise InputError(purpose, None, f"needs {module}, which is not installed: "
                         "pip install 'trundle[view]' (or pip install -e '.[view]' in a checkout)")


def quote(value, limit: int = 40) -> str:
    """``'value'`` for a message: at most ``limit`` characters of it, control characters escaped.

    Messages quote the offending value, never whole lines of a file: a long
    value is cut (``'abc...' (5000 characters)``), so pointing Trundle at some
    other file does not copy that file into a terminal or a CI report.
    """
    if isinstance(value, int) and not isinstance(value, bool) and value.bit_length() > 200:
        digits = int((value.bit_length() - 1) * 0.30102999566398120) + 1
        digits += abs(value) >= 10 ** digits
        return f"a whole number of {digits} digits"
    text = value if isinstance(value, str) else str(value)
    n = len(text)
    if n <= limit and text.isprintable():
        return f"'{text}'"
    cut = text[:limit]
    shown = "".join(c if c.isprintable() else repr(c)[1:-1] for c in cut)
    if n > limit:
        return f"'{shown}...' ({n} characters)"
    return f"'{shown}'"


def clip(text: str, limit: int = 120) -> str:
    """``text`` cut to ``limit`` characters (with ``...``), control characters escaped."""
    text = str(text)
    if len(text) <= limit and text.isprintable():
        return text
    text = "".join(c if c.isprintable() else repr(c)[1:-1] for c in text[:limit + 1])
    return text if len(text) <= limit else text[:limit] + "..."
