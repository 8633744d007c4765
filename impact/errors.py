"""Error types, one per cause: a bad case file, a bad run setting, unreadable input, and outputs
that could not be written.

The command line turns each into one line on stderr and exit status 2. A :class:`SettingError`
names the library's parameter (``members``, ``out``); the command line maps it to its flag, so the
library never speaks of flags. Keeping reading and
writing apart lets the message say what actually went wrong: a results folder that cannot be
read is not a full disk.
"""

from __future__ import annotations

import re
from typing import Mapping


class ImpactError(Exception):
    """The base of every error impact raises on purpose: catch this to catch them all.

    Each cause has its own subclass (:class:`CaseError`, :class:`SettingError`, :class:`ReadError`,
    :class:`WriteError`, :class:`InstallationError`); anything else escaping the library is a defect.
    """


class CaseError(ImpactError):
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


class SettingError(ImpactError):
    """A run setting (a keyword of the Python API, a flag of the command line) that is not allowed.

    Parameters
    ----------
    parameter : str
        The API parameter's name, e.g. ``"members"``.
    message : str
        What is wrong and what is allowed. Other settings it mentions are written in backticks
        (```resume```), so each interface can show them in its own spelling (see :meth:`render`).
    """

    def __init__(self, parameter: str, message: str):
        self.parameter = parameter
        self.message = message
        super().__init__(f"{parameter}: {message}")

    def render(self, names: Mapping[str, str]) -> str:
        """The message with each backticked setting spelled as ``names`` spells it.

        Parameters
        ----------
        names : mapping of str to str
            Parameter name to the interface's name (e.g. ``{"resume": "--resume"}``); names not
            in it keep their parameter spelling.
        """
        return spell(self.message, names)


def spell(message: str, names: Mapping[str, str]) -> str:
    """``message`` with each backticked setting name (```out```) spelled as ``names`` spells it.

    Names not in ``names`` keep their parameter spelling, without the backticks.
    """
    return re.sub(r"`([a-z_]+)`", lambda m: names.get(m.group(1), m.group(1)), message)


class ReadError(CaseError):
    """An input that exists (or should) but cannot be used: a case file that cannot be read
    (permissions, a folder, I/O), or a results folder that is missing, incomplete or damaged."""


class InstallationError(ImpactError):
    """impact's own files (the report templates) are missing: a broken installation, not bad input."""


class WriteError(ImpactError):
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
