"""Error types: bad user input, unreadable input, and outputs that could not be written.

The command line turns each into one line on stderr and an exit status: a :class:`CaseError`
(including a :class:`ReadError`) and a :class:`WriteError` give status 2. Keeping reading and
writing apart lets the message say what actually went wrong: a results folder that cannot be
read is not a full disk.
"""

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


class ReadError(CaseError):
    """An input file exists (or should) but could not be read: permissions, a folder, I/O."""


class WriteError(Exception):
    """An output (results folder, checkpoint, lock, report) could not be written.

    Parameters
    ----------
    path : str
        The file or folder that could not be written.
    message : str
        What failed and what the user can do; checkpoints already saved stay valid.
    """

    def __init__(self, path: str, message: str):
        self.path = str(path)
        self.message = message
        super().__init__(f"{self.path}: {message}")
