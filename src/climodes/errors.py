"""User-facing errors.

Every problem a user can fix (a bad config key, a missing file, a selection
that leaves nothing) is raised as a :class:`UserError`.  The command line turns
it into one line on stderr and exit code 2; anything else is a bug and exits 1.
"""


class UserError(Exception):
    """A problem with the user's input, reported as one line without a traceback.

    The message names the file, variable or config key at fault and says what
    to do about it; ``problems`` holds its lines (one, but for a :class:`ConfigError`).

    >>> UserError("data.nc: no variable 'sst'").problems
    ["data.nc: no variable 'sst'"]
    """

    @property
    def problems(self) -> list[str]:
        return [str(self)]


class ConfigError(UserError):
    """One or more problems in a YAML config; ``problems`` holds one line each."""

    def __init__(self, problems: list[str]):
        self._problems = list(problems)
        super().__init__("\n".join(problems))

    @property
    def problems(self) -> list[str]:
        return self._problems


def shortened(text: str, limit: int = 60) -> str:
    """``text`` cut to ``limit`` characters, an ellipsis marking the cut, for a one-line message.

    >>> shortened("x" * 100, limit=10)
    'xxxxxxx...'
    """
    return text if len(text) <= limit else text[: limit - 3] + "..."


def quoted(value: object, limit: int = 60) -> str:
    """``repr(value)`` cut to ``limit`` characters (see :func:`shortened`): a value quoted in a message."""
    return shortened(repr(value), limit)
