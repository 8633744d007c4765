"""The output folder of a run: what happens to an existing one, the lock, and the final move.

Policy (also in the README):

* A new or empty results folder (``out``) is created when the run completes; until then the results are built
  in a hidden sibling ``.NAME.partial-PID`` and moved into place only when complete.
* An existing, non-empty one is refused before anything is computed, unless the command
  sets ``replace_results`` (``--replace-results``). Even then only the files impact wrote there are replaced (those
  listed in its ``inventory.json``, and the file names impact writes); every other file (notes,
  a spreadsheet the user added) is kept, and the command lists what it replaced and kept.
  A folder that holds no impact results at all is never written into.
* One run at a time per output folder: ``.NAME.lock`` beside the folder holds the owner's pid,
  host and process start time. A second run on the same folder refuses at once; a lock whose
  process is gone (same host) is stale and is taken over. Holding the lock, a run removes the
  partial and replaced folders that killed runs left behind.
* Folders and files are created with the ordinary mode the umask gives (no private temp modes).
* Once the finished results start moving into place, Ctrl-C and SIGTERM are ignored until the
  command returns: a run that has written its results is not reported as interrupted.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import socket
import time
from pathlib import Path

from impact.errors import SettingError, WriteError
from impact.run.interrupts import ignore_from_now_on

# A half-made lock file (written, not yet linked into place) older than this belongs to no
# starting run and may be removed (seconds; the write-then-link takes milliseconds).
STALE_TMP_SECONDS = 60
INVENTORY = "inventory.json"
# Names impact writes into a results folder (older folders have no inventory.json): a file with
# one of these names is treated as impact's own when replace_results replaces a folder.
TOOL_FILES = frozenset({
    INVENTORY, "manifest.json", "risk.csv", "effects.csv", "objectives.csv", "comparisons.csv", "bands.csv",
    "members.csv", "parameters.csv", "priors.csv", "summary.txt", "report.pdf", "report.pdf.sha256", "README.md",
    "sensitivity/drivers.csv", "sensitivity/information.csv",
    "sensitivity/indices.csv", "sensitivity/second_order.csv", "sensitivity/ranking.csv",
    "sensitivity/convergence.csv", "sensitivity/sensitivity.json",
    "dynamics/regimes.csv", "dynamics/regime_shares.csv", "dynamics/risk_by_regime.csv", "dynamics/scan.csv",
    "dynamics/scan_points.csv", "dynamics/transitions.csv", "dynamics/dynamics.json",
    "calibration/posterior.csv", "calibration/generations.csv", "calibration/predictive.csv", "ensemble.npz",
    "press_signs.csv", "press_signs.json",
    "structures/weights.csv", "structures/choices.csv", "structures/risk.csv", "structures/effects.csv",
    "structures/objectives.csv", "structures/comparisons.csv", "structures/regime_shares.csv",
})


def list_files(folder: Path) -> list[str]:
    """Relative paths (with ``/``) of every file under ``folder``, sorted."""
    return sorted(p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file() or p.is_symlink())


_files = list_files


def tool_files(folder: Path) -> set[str]:
    """The files of an existing results folder that impact wrote (inventory and known names).

    A folder without ``inventory.json`` or ``manifest.json`` is not a results folder: a
    ``report.pdf`` or ``summary.txt`` there is the user's, whatever its name.
    """
    present = set(_files(folder))
    if not present & {INVENTORY, "manifest.json"}:
        return set()
    listed: set[str] = set()
    try:
        listed = set(json.loads((folder / INVENTORY).read_text(encoding="utf-8")).get("files", []))
    except (OSError, ValueError, AttributeError):
        pass  # no or unreadable inventory: fall back on the names impact writes
    return present & (listed | TOOL_FILES)


def _process_start(pid: int) -> str | None:
    """The kernel's start time of process ``pid`` (clock ticks since boot), where /proc has it."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    return stat.rsplit(")", 1)[1].split()[19]


def _alive(record: dict) -> bool | None:
    """Whether the process that wrote a lock still runs: True, False, or None when unknowable."""
    if record.get("host") != socket.gethostname():
        return None
    pid = record.get("pid")
    if not isinstance(pid, int) or pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass  # alive, owned by someone else
    start = record.get("process_start")
    now = _process_start(pid)
    return not (start and now and start != now)  # a different process reusing the pid


class OutputFolder:
    """Where a command's results go: policy checks first, then the lock, then staging.

    Constructing one checks the policy and touches nothing on disk; :meth:`acquire` creates the
    parent folder and takes the lock; :meth:`stage` yields the partial folder and moves it into
    place when the block ends without an exception (removing it otherwise).

    Parameters
    ----------
    out : str or Path
        The ``--out`` folder.
    replace : bool
        ``--replace-results`` was given: impact's own files in an existing folder may be replaced.
    """

    def __init__(self, out, replace: bool = False):
        self.path = Path(os.path.abspath(out))
        self.replace = bool(replace)
        self.replaced: list[str] = []
        self.kept: list[str] = []
        self.stale_lock: dict | None = None
        self.lock = self.path.parent / f".{self.path.name}.lock"
        self._held = False
        if not self.path.name:
            raise SettingError("out", f"{out!r} is the file system root; name a folder for the results")
        if self.path.exists() and not self.path.is_dir():
            raise SettingError("out", f"{self.path} exists and is not a folder; choose a new or empty folder")
        try:
            existing = _files(self.path) if self.path.is_dir() else []
        except OSError as exc:
            raise SettingError("out", f"{self.path} cannot be listed ({exc.strerror or exc})") from None
        if not existing:
            return
        mine = tool_files(self.path)
        if not self.replace:
            what = "results of an earlier run" if mine else f"{len(existing)} files not written by impact"
            raise SettingError("out", f"{self.path} already exists and holds {what}; nothing was changed. Choose a new or "
                            f"empty folder" + (f", or set `replace_results` to replace the {len(mine)} files impact "
                                               f"wrote there" + (f" (the {len(existing) - len(mine)} other files "
                                                                 "are kept)" if len(existing) > len(mine) else "")
                                               if mine else ""))
        if not mine:
            raise SettingError("replace_results",
                            f"{self.path} holds no results written by impact ({len(existing)} other files); "
                            "choose a new or empty folder: impact never writes into a folder of other files")

    # -------------------------------------------------------------------------------- the lock

    def acquire(self) -> "OutputFolder":
        """Create the parent folder, take the lock and remove what killed runs left behind."""
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            record = {"pid": os.getpid(), "host": socket.gethostname(), "process_start": _process_start(os.getpid()),
                      "started_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()), "folder": str(self.path)}
            tmp = self.lock.with_name(f"{self.lock.name}.{os.getpid()}.tmp")
            tmp.write_text(json.dumps(record) + "\n", encoding="utf-8")
        except OSError as exc:
            raise WriteError(exc.filename or self.path.parent, f"cannot write here ({exc.strerror or exc}); "
                                                               "choose another `out`") from None
        try:
            for _ in range(3):
                try:
                    os.link(tmp, self.lock)  # atomic: fails if another run holds the lock
                    self._held = True
                    break
                except FileExistsError:
                    self._take_over_stale()
            else:
                raise SettingError("out", f"{self.path} is locked by {self.lock}, which keeps "
                                                         "changing; is another run starting on the same folder?")
        except OSError as exc:
            raise WriteError(self.lock, f"cannot take the lock ({exc.strerror or exc})") from None
        finally:
            tmp.unlink(missing_ok=True)
        self._remove_leftovers()
        return self

    def _take_over_stale(self):
        try:
            record = json.loads(self.lock.read_text(encoding="utf-8"))
            if not isinstance(record, dict):
                record = {}
        except FileNotFoundError:
            return  # released meanwhile: try again
        except (OSError, ValueError):
            record = {}  # locks are written whole (link of a complete file): a garbled one is no run's
        alive = _alive(record) if record else False
        if alive is not False:
            owner = f"pid {record.get('pid')} on host {record.get('host')}, since {record.get('started_utc')}"
            hint = ("wait for it to finish or choose another `out`" if alive else
                    f"if that run is no longer alive, delete {self.lock}; otherwise wait or choose another `out`")
            raise SettingError("out", f"{self.path} is in use by another impact run ({owner}); {hint}")
        # stale: move it aside atomically, so that of two runs taking it over only one succeeds
        aside = self.lock.with_name(f"{self.lock.name}.stale-{os.getpid()}")
        try:
            os.rename(self.lock, aside)
        except FileNotFoundError:
            return
        aside.unlink(missing_ok=True)
        self.stale_lock = record

    def _remove_leftovers(self):
        """Partial and replaced folders of killed runs on this output (no live run owns them: we hold the lock)."""
        for pattern in (f".{self.path.name}.partial-*", f".{self.path.name}.old-*", f"{self.lock.name}.stale-*"):
            for p in self.path.parent.glob(pattern):
                if p.is_dir() and not p.is_symlink():
                    shutil.rmtree(p, ignore_errors=True)
                else:
                    p.unlink(missing_ok=True)
        # a lock being written by a run that is starting right now is young: leave it to that run
        for p in self.path.parent.glob(f"{self.lock.name}.*.tmp"):
            try:
                if time.time() - p.stat().st_mtime > STALE_TMP_SECONDS:
                    p.unlink()
            except OSError:
                pass

    def release(self):
        """Remove the lock if this run still holds it."""
        if not self._held:
            return
        self._held = False
        try:
            if json.loads(self.lock.read_text(encoding="utf-8")).get("pid") == os.getpid():
                self.lock.unlink()
        except (OSError, ValueError, AttributeError):
            pass

    def __enter__(self):
        return self.acquire()

    def __exit__(self, *exc):
        self.release()
        return False

    # -------------------------------------------------------------------------------- staging

    def stage(self):
        """Context manager: a fresh partial folder, moved into place if the block succeeds."""
        return _Staging(self)

    def _commit(self, tmp: Path):
        files = _files(tmp)
        _write_inventory(tmp, files)
        if not self.path.exists():
            os.rename(tmp, self.path)
            return
        # an existing folder stays the same folder (it may be a shell's working directory)
        old = tool_files(self.path)
        new = set(_files(tmp))
        backup = self.path.parent / f".{self.path.name}.old-{os.getpid()}"
        for rel in sorted(old):
            _move(self.path / rel, backup / rel)
        for rel in sorted(new):
            target = self.path / rel
            if target.exists():  # a file of the user's with a name impact writes: keep it, renamed
                kept = target.with_name(f"{target.name}.kept-{time.strftime('%Y%m%dT%H%M%S')}")
                os.rename(target, kept)
            _move(tmp / rel, target)
        for d in sorted({(self.path / rel).parent for rel in old}, key=lambda p: -len(p.parts)):
            if d != self.path:
                try:
                    d.rmdir()  # a stage folder the new results no longer have, if nothing else is in it
                except OSError:
                    pass
        shutil.rmtree(backup, ignore_errors=True)
        shutil.rmtree(tmp, ignore_errors=True)
        self.replaced = sorted(old)
        self.kept = sorted(set(_files(self.path)) - new)


class _Staging:
    def __init__(self, folder: OutputFolder):
        self.folder = folder
        self.tmp = folder.path.parent / f".{folder.path.name}.partial-{os.getpid()}"

    def __enter__(self) -> Path:
        try:
            if self.tmp.exists():
                shutil.rmtree(self.tmp)
            self.tmp.mkdir(mode=0o777)  # the umask decides, as for any folder the user makes
        except OSError as exc:
            raise WriteError(exc.filename or self.tmp, f"cannot write here ({exc.strerror or exc}); "
                                                       "choose another `out`") from None
        return self.tmp

    def __exit__(self, kind, exc, tb):
        if kind is not None:
            shutil.rmtree(self.tmp, ignore_errors=True)
            if issubclass(kind, OSError):  # a full disk, a quota, a folder gone read-only while writing
                raise WriteError(self.folder.path, f"could not write the results ({exc.strerror or exc}); nothing "
                                                   "was left half-written. Free space and run the same command "
                                                   "again (an assessment continues from its saved chunks with "
                                                   "`resume`)") from None
            return False
        # from the final move on the run has succeeded: Ctrl-C and SIGTERM no longer undo it
        ignore_from_now_on()
        try:
            self.folder._commit(self.tmp)
        except OSError as e:
            raise WriteError(e.filename or self.folder.path,
                             f"could not move the finished results into place ({e.strerror or e}); the complete "
                             f"results are in {self.tmp}") from None
        return False


def _move(src: Path, dst: Path):
    dst.parent.mkdir(parents=True, exist_ok=True)
    os.rename(src, dst)


# The report states the inventory's hash on its first page, so it cannot itself be hashed in the
# inventory (the two are tied the other way: impact.store.verify checks a PDF against its folder).
UNHASHED = frozenset({INVENTORY, "report.pdf", "report.pdf.sha256"})
# the SHA-256 of report.pdf, written beside it (``sha256sum -c`` reads it)
REPORT_HASH = "report.pdf.sha256"


def file_sha256(path: Path) -> str:
    """SHA-256 of a file's bytes, as 64 hexadecimal digits (read in 1 MiB blocks)."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def inventory_record(folder: Path, files) -> dict:
    """``inventory.json`` of ``folder``: ``tool``, ``files`` (every file, relative, sorted) and ``sha256``
    (file -> SHA-256 of its bytes, for every file but those in :data:`UNHASHED`)."""
    listed = sorted(set(files) | {INVENTORY})
    hashes = {rel: file_sha256(Path(folder) / rel) for rel in listed
              if rel not in UNHASHED and (Path(folder) / rel).is_file()}
    return {"tool": "impact", "files": listed, "sha256": hashes}


def write_inventory(folder: Path, extra=()) -> None:
    """Write ``inventory.json`` of the files now in ``folder`` and of ``extra`` files still to come
    (``report.pdf``, which reads the inventory's hash). Writing it again once they are there gives
    the same bytes."""
    folder = Path(folder)
    (folder / INVENTORY).write_text(json.dumps(inventory_record(folder, set(_files(folder)) | set(extra)), indent=2)
                                    + "\n", encoding="utf-8")


def _write_inventory(folder: Path, files: list[str]):
    write_inventory(folder, files)
