"""A results folder that proves its numbers: its files against their recorded hashes, a PDF against its folder.

Every folder impact writes holds ``inventory.json`` with the SHA-256 of every file it wrote
(:func:`impact.store.outfolder.inventory_record`) except ``report.pdf``, which is tied the other way:
the report states the SHA-256 of ``inventory.json`` on its first page and in its document keywords
(``impact-inventory-sha256:HEX``). :func:`check_folder` says which files no longer match;
:func:`pdf_statement` reads the hash a PDF states; :func:`verify` puts both together for
``impact verify``.
"""

from __future__ import annotations

import hashlib
import json
import re
import zlib
from dataclasses import dataclass, field
from pathlib import Path

from impact.errors import ReadError
from impact.store.outfolder import INVENTORY, REPORT_HASH, UNHASHED, file_sha256, list_files

PDF_MARK = "impact-inventory-sha256:"
# beside it in a report built with accept_edits: the files that differed from the inventory
EDITED_MARK = "impact-edited:"
# files a report may read: any of these added after the run is a difference, other files (notes) are not
DATA_SUFFIXES = (".csv", ".json", ".npz")


@dataclass(frozen=True)
class FolderCheck:
    """What differs between a results folder and its ``inventory.json``.

    Attributes
    ----------
    inventory_sha256 : str or None
        SHA-256 of ``inventory.json`` (None: the folder has none, written by an older impact).
    hashed : bool
        The inventory records files' hashes (older inventories list names only).
    changed, missing, added : tuple of str
        Files whose bytes differ from their recorded hash, recorded files no longer there, and
        data files (CSV, JSON, NPZ) the inventory does not list.
    unlisted : tuple of str
        Other files not written by impact (kept, not checked).
    """

    folder: Path
    inventory_sha256: str | None
    hashed: bool
    changed: tuple[str, ...] = ()
    missing: tuple[str, ...] = ()
    added: tuple[str, ...] = ()
    unlisted: tuple[str, ...] = ()

    @property
    def intact(self) -> bool:
        """Every recorded file is there with its recorded bytes, and no data file was added."""
        return self.hashed and not (self.changed or self.missing or self.added)

    def differences(self) -> list[str]:
        """One line per difference, naming the file."""
        return ([f"{rel}: changed since impact wrote it (SHA-256 differs from inventory.json)" for rel in self.changed]
                + [f"{rel}: listed in inventory.json but missing" for rel in self.missing]
                + [f"{rel}: a data file inventory.json does not list (added after the run)" for rel in self.added])


def check_folder(folder) -> FolderCheck:
    """Compare every file of ``folder`` with the hash ``inventory.json`` records for it.

    Raises
    ------
    ReadError
        ``folder`` is not a folder, or its ``inventory.json`` is not an inventory.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise ReadError(str(folder), "", "is not a folder written by impact")
    path = folder / INVENTORY
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        return FolderCheck(folder, None, False)
    except OSError as exc:
        raise ReadError(str(path), "", f"cannot be read ({exc.strerror or exc})") from None
    try:
        record = json.loads(raw.decode("utf-8"))
        listed, hashes = list(record["files"]), dict(record.get("sha256") or {})
        if not all(isinstance(x, str) for x in listed) or not all(isinstance(x, str) for x in hashes.values()):
            raise TypeError("entries must be text")
    except (UnicodeDecodeError, ValueError, KeyError, TypeError) as exc:
        raise ReadError(str(path), "", f"is not an inventory written by impact ({exc}); the folder is damaged") from None
    present = set(list_files(folder))
    changed, missing = [], []
    for rel in sorted(hashes):
        target = folder / rel
        if rel not in present or not target.is_file():
            missing.append(rel)
        elif file_sha256(target) != hashes[rel]:
            changed.append(rel)
    missing += [rel for rel in sorted(set(listed) - present - set(hashes)) if rel not in UNHASHED]
    others = sorted(present - set(listed) - UNHASHED)
    added = tuple(rel for rel in others if rel.endswith(DATA_SUFFIXES))
    return FolderCheck(folder, hashlib.sha256(raw).hexdigest(), bool(hashes), tuple(changed), tuple(sorted(missing)),
                       added, tuple(rel for rel in others if rel not in added))


def pdf_statement(pdf) -> tuple[str | None, list[str]]:
    """The inventory hash a report states in its document keywords (None when it states none),
    and the files it says were edited after the run (built with ``accept_edits``).

    WeasyPrint compresses the document information into object streams: each stream is
    inflated in turn and searched for the mark.
    """
    data = Path(pdf).read_bytes()
    pattern = re.compile(re.escape(PDF_MARK.encode()) + rb"([0-9a-f]{64})(?: " + re.escape(EDITED_MARK.encode())
                         + rb"([^)>]*))?")
    found = pattern.search(data)
    if not found:
        for start in re.finditer(rb"stream\r?\n", data):
            try:
                found = pattern.search(zlib.decompressobj().decompress(data[start.end():]))
            except zlib.error:
                continue
            if found:
                break
    if not found:
        return None, []
    edited = found.group(2).decode("utf-8", "replace").split(",") if found.group(2) else []
    return found.group(1).decode(), edited


@dataclass
class Verification:
    """The outcome of :func:`verify`: ``ok`` and the lines to print."""

    ok: bool
    lines: list[str] = field(default_factory=list)


def verify(folder, pdf=None) -> Verification:
    """Check a results folder against its inventory, and a PDF (default: its report.pdf) against the folder.

    Raises
    ------
    ReadError
        The folder or PDF cannot be read.
    """
    check = check_folder(folder)
    if check.inventory_sha256 is None:
        return Verification(False, [f"{check.folder}: no inventory.json; this folder cannot be checked (written by "
                                    "an older impact, or not by impact)"])
    if not check.hashed:
        return Verification(False, [f"{check.folder}: inventory.json records no file hashes (written by an older "
                                    "impact); this folder cannot be checked"])
    lines = [f"{check.folder}: " + d for d in check.differences()]
    ok = check.intact
    if ok:
        lines.append(f"{check.folder}: every file matches inventory.json (SHA-256 {check.inventory_sha256})")
    if check.unlisted:
        lines.append(f"not written by impact, not checked: {', '.join(check.unlisted)}")
    target = Path(pdf) if pdf is not None else check.folder / "report.pdf"
    if pdf is None and not target.exists():
        return Verification(ok, lines)
    try:
        stated, edited = pdf_statement(target)
    except OSError as exc:
        raise ReadError(str(target), "", f"cannot be read ({exc.strerror or exc})") from None
    if edited:
        ok = False
        lines.append(f"{target}: built from files edited after the run ({', '.join(edited)}): its numbers are "
                     "not all impact's")
    if stated is None:
        ok = False
        lines.append(f"{target}: states no inventory hash (not a report of this impact version, or altered)")
    elif stated != check.inventory_sha256:
        ok = False
        lines.append(f"{target}: states inventory SHA-256 {stated}, but {check.folder / INVENTORY} has "
                     f"{check.inventory_sha256}: the PDF was not made from this folder")
    elif not edited:
        lines.append(f"{target}: made from this folder (states inventory SHA-256 {stated})")
    recorded = _recorded_report_hash(check.folder)
    if recorded is not None and stated == check.inventory_sha256:
        if file_sha256(target) == recorded:
            lines.append(f"{target}: byte for byte the report.pdf impact wrote here ({REPORT_HASH})")
        else:
            ok = False
            lines.append(f"{target}: differs from the report.pdf impact wrote here (SHA-256 in {REPORT_HASH}): "
                         "altered, or rebuilt elsewhere with `impact report --out`")
    return Verification(ok, lines)


def _recorded_report_hash(folder: Path) -> str | None:
    try:
        token = (folder / REPORT_HASH).read_text(encoding="utf-8").split()[0]
    except (OSError, UnicodeDecodeError, IndexError):
        return None
    return token if re.fullmatch(r"[0-9a-f]{64}", token) else None
