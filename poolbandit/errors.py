"""Exception and warning types shared by the whole package.

Bad user input always raises a subclass of :class:`InputError`; the command
line turns these into exit status 2 with the message on stderr.
"""

from __future__ import annotations

__all__ = [
    "InputError",
    "DesignError",
    "LogError",
    "ConvergenceWarning",
    "OverlapWarning",
    "format_value",
]


def format_value(value: object) -> str:
    """Format an offending value for a message: strings in double quotes."""
    if isinstance(value, str):
        return '"' + value.replace('"', '\\"') + '"'
    return repr(value)


class InputError(ValueError):
    """Bad input from a user: a file, a table, an argument. Exit status 2."""


class DesignError(InputError):
    """A design file is malformed. The message names the key path and value.

    Parameters
    ----------
    path : str
        Dotted key path inside the design, for example ``policies.ucb.c``.
    message : str
        What was expected and what was found.
    source : str, optional
        The file the design came from.
    """

    def __init__(self, path: str, message: str, *, source: str | None = None):
        self.path = path
        self.source = source
        prefix = f"{source}: " if source else ""
        super().__init__(f"{prefix}{path}: {message}" if path else f"{prefix}{message}")


class LogError(InputError):
    """A study log (or another table) failed validation.

    Parameters
    ----------
    problems : list of str
        One line per problem, each naming row, column and value.
    source : str, optional
        The file the table came from.
    """

    def __init__(self, problems: list[str], *, source: str | None = None):
        self.problems = list(problems)
        self.source = source
        head = f"{source}: " if source else ""
        shown = self.problems[:50]
        more = len(self.problems) - len(shown)
        text = "\n".join(f"  {p}" for p in shown)
        if more:
            text += f"\n  ... and {more} more problems"
        n = len(self.problems)
        super().__init__(f"{head}{n} problem{'s' if n != 1 else ''} found:\n{text}")


class ConvergenceWarning(UserWarning):
    """An MCMC diagnostic (R-hat, ESS, divergences) crossed its threshold."""


class OverlapWarning(UserWarning):
    """Propensities give too little overlap for a trustworthy weighted estimate."""
