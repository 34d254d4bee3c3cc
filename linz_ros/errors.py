"""The exceptions of linz_ros: every user mistake is one of these, with a one-line message.

Each subclasses :class:`ValueError` so callers may catch either; the command line turns
any :class:`LinzError` into a single line on stderr and exit code 2.
"""

from __future__ import annotations

__all__ = ["LinzError", "ExpressionSyntaxError", "LocatedError", "PlantFileError", "AnalysisError", "DesignError",
           "ArtifactError", "ConfigError", "quoted", "MAX_QUOTED", "MAX_MESSAGE"]

#: Characters of user text (a path, a field, an option) quoted in a message at most.
MAX_QUOTED = 120
#: Characters of a whole message at most (the problem may quote user text too).
MAX_MESSAGE = 1000


def quoted(text: str, width: int = MAX_QUOTED) -> str:
    """User text for a message: as given, or its first characters, ``...`` and its length.

    Parameters
    ----------
    text : str
    width : int

    Returns
    -------
    str

    Examples
    --------
    >>> quoted("x" * 200, 10)
    'xxxxxxxxxx... (200 characters)'
    """
    return text if len(text) <= width else f"{text[:width]}... ({len(text)} characters)"


class LinzError(ValueError):
    """Base class of all errors caused by user input (files, parameters, options).

    A message longer than :data:`MAX_MESSAGE` is cut there (user text of any length must
    not flood the terminal); the parts that name the input are capped by :func:`quoted`.
    """

    def __init__(self, *args: object) -> None:
        if len(args) == 1 and isinstance(args[0], str) and len(args[0]) > MAX_MESSAGE:
            args = (quoted(args[0], MAX_MESSAGE),)
        super().__init__(*args)


class ExpressionSyntaxError(LinzError):
    """An expression that the whitelisted arithmetic grammar does not accept.

    Parameters
    ----------
    text : str
        The expression as written.
    column : int
        1-based column of the offending character (0 when not about one place).
    problem : str
        What is wrong, in a few words.
    """

    def __init__(self, text: str, column: int, problem: str) -> None:
        self.text = text
        self.column = column
        self.problem = problem
        where = f" at column {column}" if column else ""
        super().__init__(f"cannot read {_excerpt(text, column)!r}: {problem}{where}")


def _excerpt(text: str, column: int, width: int = 60) -> str:
    """The text, or for long text the part around ``column`` with ellipses."""
    if len(text) <= width:
        return text
    start = max(0, min(column - 1 - width // 2, len(text) - width)) if column else 0
    return ("..." if start > 0 else "") + text[start:start + width] + ("..." if start + width < len(text) else "")


class LocatedError(LinzError):
    """A mistake at one place of one input: ``source: field: problem``.

    Parameters
    ----------
    source : str
        The file name (``<string>`` for text given directly, ``<command line>`` for options).
    field : str
        Dotted path of the offending field, e.g. ``dynamics.x2``; empty for the whole input.
    problem : str
        What is wrong, in one line.
    """

    def __init__(self, source: str, field: str, problem: str) -> None:
        self.source = source
        self.field = field
        self.problem = problem
        parts = [quoted(source)] + ([quoted(field)] if field else []) + [problem]
        super().__init__(": ".join(parts))


class PlantFileError(LocatedError):
    """A plant file that cannot be loaded; names the file, the field and the problem."""


class AnalysisError(LinzError):
    """A request to the analysis that does not make sense for the plant (e.g. a bad point)."""


class DesignError(LocatedError):
    """A design that cannot be synthesised (wrong pole count, unreachable outputs, ...);
    names the plant file or ``<command line>``, the field and the problem."""


class _NamedError(LinzError):
    """A mistake in one named input as a whole: ``name: problem``.

    Subclasses say in ``_NAME`` which attribute keeps the name (``source`` for a file,
    ``field`` for a setting); ``problem`` keeps what is wrong.
    """

    _NAME = "name"

    def __init__(self, name: str, problem: str) -> None:
        setattr(self, self._NAME, name)
        self.problem = problem
        super().__init__(f"{quoted(name)}: {problem}")


class ArtifactError(_NamedError):
    """A controller artifact that cannot be loaded or written; names the file and the problem.

    Parameters
    ----------
    source : str
        The artifact file.
    problem : str
        What is wrong, in one line.
    """

    _NAME = "source"
    source: str


class ConfigError(_NamedError):
    """A runtime or simulation setting that is out of range or inconsistent.

    Parameters
    ----------
    field : str
        The setting, e.g. ``sigma_act`` or ``--mismatch``.
    problem : str
        What is wrong, in one line.
    """

    _NAME = "field"
    field: str
