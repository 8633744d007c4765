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

import numpy as np
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


class Checkpoints:
    """Finished chunks of a run, saved as they arrive so that an interrupted run can resume.

    The chunks live in ``.<out>.checkpoints/`` beside the results directory (the results
    directory itself only appears, whole, when the run completes). Each chunk is one ``.npz``
    file of plain arrays (no pickles), written to a temporary name and renamed, so a chunk on
    disk is always complete. ``fingerprint.json`` records what the chunks were computed for; a
    resumed run must match it exactly.

    Parameters
    ----------
    out : Path
        The results directory the run will write.
    fingerprint : dict
        Everything the chunk contents depend on (case hash, seed, members, chunking, version).
    resume : bool
        Reuse matching chunks; without it any earlier checkpoints are discarded.
    """

    def __init__(self, out: Path, fingerprint: dict, resume: bool):
        out = Path(out)
        self.dir = out.parent / f".{out.name}.checkpoints"
        self.fingerprint = json.loads(json.dumps(fingerprint, default=_jsonable))
        self.reused = 0
        self.saved = 0
        fp = self.dir / "fingerprint.json"
        try:
            if resume and fp.exists():
                old = json.loads(fp.read_text(encoding="utf-8"))
                if old != self.fingerprint:
                    diff = sorted(k for k in set(old) | set(self.fingerprint) if old.get(k) != self.fingerprint.get(k))
                    raise CaseError("command line", "--resume",
                                    f"the checkpoints in {self.dir} were written for a different run (differs in: "
                                    f"{', '.join(diff)}); run again without --resume to start afresh")
            elif self.dir.exists():
                shutil.rmtree(self.dir)
            self.dir.mkdir(parents=True, exist_ok=True)
            if not fp.exists():
                _atomic_write(fp, (json.dumps(self.fingerprint, indent=2) + "\n").encode("utf-8"))
        except OSError as exc:
            raise CaseError(str(self.dir), "", f"cannot write checkpoints here ({exc.strerror or exc})") from None

    @staticmethod
    def previous(out: Path) -> dict | None:
        """The fingerprint of checkpoints left beside ``out`` by an earlier run, if any."""
        out = Path(out)
        try:
            return json.loads((out.parent / f".{out.name}.checkpoints" / "fingerprint.json").read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None

    def _path(self, key: str) -> Path:
        return self.dir / f"{key}.npz"

    def get(self, key: str) -> dict | None:
        """The saved arrays of chunk ``key``, or None."""
        path = self._path(key)
        if not path.exists():
            return None
        try:
            with np.load(path, allow_pickle=False) as z:
                data = {k: z[k] for k in z.files}
        except (OSError, ValueError):
            return None  # unreadable: compute the chunk again
        self.reused += 1
        return data

    def put(self, key: str, arrays: dict):
        """Save chunk ``key`` atomically."""
        import io

        buf = io.BytesIO()
        np.savez(buf, **arrays)
        try:
            _atomic_write(self._path(key), buf.getvalue())
        except OSError as exc:
            raise CaseError(str(self.dir), key, f"could not save a checkpoint ({exc.strerror or exc}); "
                                                "the checkpoints already written are intact: free space and rerun "
                                                "with --resume") from None
        self.saved += 1

    def get_summaries(self, key: str):
        from .assess import PER_MEMBER, Summary

        flat = self.get(key)
        if flat is None:
            return None
        names = [str(n) for n in flat["options"]]
        return {n: Summary(flat[f"{i}|times"], flat[f"{i}|at"], *(flat[f"{i}|{f}"] for f in PER_MEMBER),
                           int(flat[f"{i}|nfev"])) for i, n in enumerate(names)}

    def put_summaries(self, key: str, summaries: dict):
        from .assess import PER_MEMBER

        flat = {"options": np.array(list(summaries), dtype=str)}
        for i, s in enumerate(summaries.values()):
            for f in ("times", "at", *PER_MEMBER, "nfev"):
                flat[f"{i}|{f}"] = np.asarray(getattr(s, f))
        self.put(key, flat)

    def discard(self):
        """Remove the checkpoints once the results directory is complete."""
        shutil.rmtree(self.dir, ignore_errors=True)


def _atomic_write(path: Path, data: bytes):
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
