"""The package's one exception type.

Every problem with user input (files, metadata, option values) raises
:class:`EpicorrInputError`, a subclass of :class:`ValueError`.  Its message is
one line that names the file, the metadata key and the bad value, and says
what to do.  The command line turns it into exit code 2.
"""

from __future__ import annotations

from typing import Any

__all__ = ["EpicorrInputError"]

_UNSET = object()


class EpicorrInputError(ValueError):
    """Bad input: a file, a metadata value or an option cannot be used.

    Parameters
    ----------
    problem : str
        What is wrong, in plain words (no trailing full stop needed).
    file : str or path-like, optional
        The file the bad value came from.
    key : str, optional
        The metadata key or option name.
    value : object, optional
        The offending value (shown with ``repr``).
    hint : str, optional
        What the user should do about it.

    Examples
    --------
    >>> err = EpicorrInputError("must be positive", file="sub-01_bold.json",
    ...                         key="EffectiveEchoSpacing", value=-1.0,
    ...                         hint="give the echo spacing in seconds")
    >>> str(err)
    'sub-01_bold.json: EffectiveEchoSpacing=-1.0: must be positive; give the echo spacing in seconds'
    """

    def __init__(self, problem: str, *, file: Any = None, key: str | None = None,
                 value: Any = _UNSET, hint: str | None = None) -> None:
        self.problem = str(problem).rstrip(". ")
        self.file = None if file is None else str(file)
        self.key = key
        self.value = None if value is _UNSET else value
        self.has_value = value is not _UNSET
        self.hint = hint
        super().__init__(self._format())

    def _format(self) -> str:
        where = []
        if self.file:
            where.append(self.file)
        if self.key is not None:
            where.append(f"{self.key}={self.value!r}" if self.has_value else self.key)
        elif self.has_value:
            where.append(f"value {self.value!r}")
        text = ": ".join(where + [self.problem])
        if self.hint:
            text += f"; {self.hint.rstrip('. ')}"
        # One line, always.
        return " ".join(text.split())

    def with_file(self, file: Any) -> "EpicorrInputError":
        """Return a copy that names ``file`` (used by nodes and the CLI)."""
        if self.file:
            return self
        kwargs = dict(file=file, key=self.key, hint=self.hint)
        if self.has_value:
            kwargs["value"] = self.value
        return EpicorrInputError(self.problem, **kwargs)
