"""Writing and reading the results directory.

Outputs are written into a temporary sibling directory and renamed into place only when
complete, so an interrupted or failed run never leaves half-written results behind.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from contextlib import contextmanager
from pathlib import Path

import pandas as pd

from .errors import CaseError


@contextmanager
def staged_directory(out: Path):
    """Yield a temporary directory that replaces ``out`` atomically on success.

    An existing ``out`` is only replaced when it looks like a results directory
    (it holds a ``manifest.json``) or is empty, so a typo cannot wipe unrelated files.
    """
    out = Path(out)
    if out.exists() and (not out.is_dir() or (any(out.iterdir()) and not (out / "manifest.json").exists())):
        raise CaseError("command line", "--out", f"{out} exists and is not a results directory; choose a new or empty directory")
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    try:
        yield tmp
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    old = None
    if out.exists():
        old = out.parent / f".{out.name}.old-{os.getpid()}"
        os.rename(out, old)
    os.rename(tmp, out)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def write_csv(frame: pd.DataFrame, path: Path):
    path.parent.mkdir(parents=True, exist_ok=True)
    frame.to_csv(path, index=False, float_format="%.6g")


def write_json(obj, path: Path):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(obj, indent=2, sort_keys=False, default=_jsonable) + "\n", encoding="utf-8")


def _jsonable(x):
    import numpy as np

    if isinstance(x, (np.integer,)):
        return int(x)
    if isinstance(x, (np.floating,)):
        return float(x)
    if isinstance(x, np.ndarray):
        return x.tolist()
    if isinstance(x, Path):
        return str(x)
    raise TypeError(f"not JSON serialisable: {type(x).__name__}")


def read_manifest(results: Path) -> dict:
    path = Path(results) / "manifest.json"
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise CaseError(str(results), "manifest.json", "not found; point at a directory written by `impact assess`") from None
    except json.JSONDecodeError as exc:
        raise CaseError(str(path), "", f"is not valid JSON ({exc})") from None
