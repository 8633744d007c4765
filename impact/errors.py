"""The one error type raised for bad user input."""

from __future__ import annotations


class CaseError(Exception):
    """A problem with user input, naming the file, the field path and what is allowed.

    Parameters
    ----------
    file : str
        Path of the offending file (or a description such as ``"command line"``).
    field : str
        Dotted field path inside the file, e.g. ``"species.fox.growth_rate"``.
    message : str
        What is wrong and what is allowed.
    """

    def __init__(self, file: str, field: str, message: str):
        self.file = str(file)
        self.field = field
        self.message = message
        super().__init__(f"{self.file}: {field}: {message}" if field else f"{self.file}: {message}")
