"""Reading a monitoring series from a CSV file named by a case, as untrusted input.

The file is whatever the case names: it may be missing, a folder, a symbolic-link loop, a device
that never ends, huge, binary, not UTF-8, or a well-formed CSV holding nonsense. Before a byte is
read the path must stay inside the case file's folder (or a folder listed in the environment
variable :data:`DATA_PATH_VARIABLE`) and be a regular file of at most :data:`MAX_BYTES`. Every
refusal is a :class:`impact.errors.CaseError` naming the file, the line and the column, and a file
outside the case's folder is never quoted. The series' meaning (counts whole, times within the
spin-up) is checked by :func:`impact.case.tables.read_monitoring`, which names the line through
:attr:`SeriesFile.lines`.
"""

from __future__ import annotations

import csv
import errno
import math
import os
import stat
from dataclasses import dataclass
from pathlib import Path

from impact.case.types import SERIES_COLUMNS
from impact.errors import CaseError, ReadError

MAX_BYTES = 16 * 2**20  # 16 MiB: about a million observations, far beyond any monitoring series
MAX_CELL = 64  # characters of a cell quoted in a message
# Folders (separated as in PATH) a case may name monitoring files in besides its own folder.
DATA_PATH_VARIABLE = "IMPACT_DATA_PATH"


@dataclass(frozen=True)
class SeriesFile:
    """A series read from a file: its name as the case gives it, where it was found, times and
    values with the line each came from (1-based)."""

    name: str
    path: Path
    times: tuple[float, ...]
    values: tuple[float, ...]
    lines: tuple[int, ...]

    def fail(self, index: int, column: str, message: str):
        """Refuse observation ``index`` naming its line and column."""
        raise CaseError(str(self.path), f"line {self.lines[index]}, column {column}", message)


def _quote(cell: str) -> str:
    cell = cell.strip()
    return repr(cell if len(cell) <= MAX_CELL else cell[:MAX_CELL] + "…")


def allowed_roots(case_dir: Path) -> list[Path]:
    """The case's own folder, then the folders of :data:`DATA_PATH_VARIABLE` (resolved)."""
    extra = [Path(p) for p in os.environ.get(DATA_PATH_VARIABLE, "").split(os.pathsep) if p.strip()]
    return [case_dir.resolve()] + [p.resolve() for p in extra]


def locate(case_path, where: str, name: str) -> Path:
    """The regular file ``name`` (relative to the case file) resolves to, checked before it is read.

    Raises
    ------
    CaseError
        Naming ``where.file``: a path leaving the allowed folders, a symbolic-link loop, a missing
        file, a folder or another non-regular file, or a file larger than :data:`MAX_BYTES`.
    """
    case_path = Path(case_path)
    field = f"{where}.file"
    if not name.strip() or "\x00" in name:
        raise CaseError(str(case_path), field, "must name a CSV file, relative to the case file")
    raw = case_path.parent / name
    try:
        path = raw.resolve(strict=True)
    except FileNotFoundError:
        raise ReadError(str(raw), "", f"no such file (named by {field}; the path is relative to the case file)") from None
    except (RuntimeError, OSError) as exc:  # a symbolic-link loop (RuntimeError before Python 3.13), ELOOP, EACCES
        why = "a symbolic-link loop" if isinstance(exc, RuntimeError) or getattr(exc, "errno", None) == errno.ELOOP else \
            (getattr(exc, "strerror", None) or str(exc))
        raise ReadError(str(case_path), field, f"{name!r} cannot be resolved ({why})") from None
    roots = allowed_roots(case_path.parent)
    if not any(path.is_relative_to(root) for root in roots):
        raise CaseError(str(case_path), field, f"{name!r} leaves the case file's folder; monitoring files are read "
                                               f"only from {roots[0]} (and the folders listed in "
                                               f"{DATA_PATH_VARIABLE}): copy the file beside the case, or list its "
                                               "folder there")
    try:
        info = path.stat()
    except OSError as exc:
        raise ReadError(str(case_path), field, f"{name!r} cannot be read ({exc.strerror or exc})") from None
    if stat.S_ISDIR(info.st_mode):
        raise CaseError(str(case_path), field, f"{name!r} is a folder; name a CSV file")
    if not stat.S_ISREG(info.st_mode):
        raise CaseError(str(case_path), field, f"{name!r} is not a regular file (a device, pipe or socket)")
    if info.st_size > MAX_BYTES:
        raise CaseError(str(case_path), field, f"{name!r} holds {info.st_size:,} bytes, more than the "
                                               f"{MAX_BYTES // 2**20} MiB a monitoring file may hold")
    return path


def _text(path: Path, case_path: Path, where: str) -> str:
    try:
        with open(path, "rb") as fh:
            data = fh.read(MAX_BYTES + 1)  # a file growing since it was measured is cut here
    except OSError as exc:
        raise ReadError(str(path), "", f"cannot read the monitoring file named by {where}.file "
                                       f"({exc.strerror or exc})") from None
    if len(data) > MAX_BYTES:
        raise CaseError(str(path), "", f"holds more than the {MAX_BYTES // 2**20} MiB a monitoring file may hold")
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]  # a byte-order mark some spreadsheets write
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        column = exc.start - (data.rfind(b"\n", 0, exc.start) + 1) + 1
        raise CaseError(str(path), f"line {line}, column {column}",
                        f"is not UTF-8 text (byte 0x{data[exc.start]:02x}; named by {where}.file)") from None
    if "\x00" in text:
        line = text.count("\n", 0, text.index("\x00")) + 1
        raise CaseError(str(path), f"line {line}", f"holds a NUL byte: a binary file, not a CSV table "
                                                   f"(named by {where}.file)")
    return text


def read_series_file(case_path, where: str, name: str) -> SeriesFile:
    """Times and values from the CSV file ``name`` a case names at ``where`` (``monitoring.SPECIES``).

    The file holds the columns ``time,value`` (header first), one observation per line; lines
    starting with ``#`` are comments. Values are finite numbers; their meaning is checked by the caller.

    Raises
    ------
    CaseError
        Naming the file, the line and the column.
    """
    path = locate(case_path, where, name)
    text = _text(path, Path(case_path), where)
    header, times, values, lines = None, [], [], []
    reader = csv.reader(text.splitlines())
    while True:
        try:
            row = next(reader)
        except StopIteration:
            break
        except csv.Error as exc:
            raise CaseError(str(path), f"line {reader.line_num}", f"is not a CSV row ({exc})") from None
        k = reader.line_num
        if not row or row[0].lstrip().startswith("#") or not any(c.strip() for c in row):
            continue
        if header is None:
            header = [h.strip() for h in row]
            if header != list(SERIES_COLUMNS):
                pos = next(j for j in range(len(header) + 1)
                           if j >= len(header) or j >= len(SERIES_COLUMNS) or header[j] != SERIES_COLUMNS[j])
                got = _quote(header[pos]) if pos < len(header) else "missing"
                raise CaseError(str(path), f"line {k}, column {pos + 1}",
                                f"the first line (after # comments) must be the columns {','.join(SERIES_COLUMNS)}; "
                                f"column {pos + 1} is {got}")
            continue
        if len(row) != len(SERIES_COLUMNS):
            raise CaseError(str(path), f"line {k}", f"must hold {len(SERIES_COLUMNS)} cells (time, value), got {len(row)}")
        for col, cell, out in zip(SERIES_COLUMNS, row, (times, values)):
            try:
                x = float(cell)
            except ValueError:
                raise CaseError(str(path), f"line {k}, column {col}", f"must be a number, got {_quote(cell)}") from None
            if not math.isfinite(x):
                raise CaseError(str(path), f"line {k}, column {col}", f"must be finite, got {_quote(cell)}")
            out.append(x)
        lines.append(k)
    if header is None:
        raise CaseError(str(path), "line 1", f"is empty; a monitoring file starts with the columns "
                                             f"{','.join(SERIES_COLUMNS)}, then one observation per line")
    return SeriesFile(name, path, tuple(times), tuple(values), tuple(lines))
