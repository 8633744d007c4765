"""A results folder proves its numbers, and a reused ensemble is checked before a number of it is used.

inventory.json records the SHA-256 of every file written; the PDF states the inventory's hash;
`impact report` refuses edited tables (or builds with --accept-edits, saying so on page 1) and
`impact verify` says what differs. Contract of the project (README, "A dossier that proves its
numbers"); SHA-256 is FIPS 180-4.
"""

from __future__ import annotations

import hashlib
import io
import json
import shutil
import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))
from casefiles import decline_case, write_case  # noqa: E402

from impact.cli import main  # noqa: E402

FLAGS = ["--quiet", "--workers", "1", "--no-sensitivity", "--no-dynamics"]


@pytest.fixture(scope="module")
def assessed(tmp_path_factory):
    """A small assessment with its report, written once for the module."""
    root = tmp_path_factory.mktemp("dossier")
    case = write_case(root, decline_case(40))
    assert main(["assess", str(case), "--out", str(root / "results"), *FLAGS]) == 0
    return case, root / "results"


def copy_of(folder: Path, tmp_path: Path) -> Path:
    target = tmp_path / "copy"
    shutil.copytree(folder, target)
    return target


def edit_one_digit(path: Path) -> str:
    """Change one non-zero digit of the first number in the value column; returns the edited line."""
    lines = path.read_text(encoding="utf-8").split("\n")
    col = lines[0].split(",").index("value")
    for r in range(1, len(lines)):
        cells = lines[r].split(",")
        digits = [k for k, ch in enumerate(cells[col]) if ch in "123456789"]
        if digits:
            k = digits[0]
            cells[col] = cells[col][:k] + str(int(cells[col][k]) % 9 + 1) + cells[col][k + 1:]
            lines[r] = ",".join(cells)
            path.write_text("\n".join(lines), encoding="utf-8")
            return lines[r]
    raise AssertionError("no non-zero value to edit")


def test_the_inventory_records_every_file_hash_and_the_pdf_states_the_inventory_hash(assessed, capsys):
    from impact.store.verify import pdf_statement

    _, folder = assessed
    inventory = json.loads((folder / "inventory.json").read_text())
    on_disk = sorted(p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file())
    assert inventory["files"] == on_disk
    assert set(inventory["sha256"]) == set(on_disk) - {"inventory.json", "report.pdf", "report.pdf.sha256"}
    for rel, digest in inventory["sha256"].items():
        assert hashlib.sha256((folder / rel).read_bytes()).hexdigest() == digest, rel
    stated, edited = pdf_statement(folder / "report.pdf")
    assert stated == hashlib.sha256((folder / "inventory.json").read_bytes()).hexdigest() and edited == []
    # page 1 states it where a reader sees it (pypdf reads the text of the first page)
    import pypdf

    first_page = pypdf.PdfReader(io.BytesIO((folder / "report.pdf").read_bytes())).pages[0].extract_text()
    assert stated in first_page.replace("\n", "").replace(" ", "")
    capsys.readouterr()
    assert main(["verify", str(folder)]) == 0
    assert "verified" in capsys.readouterr().out


def test_one_edited_digit_is_detected_by_report_and_by_verify(assessed, tmp_path, capsys):
    _, original = assessed
    folder = copy_of(original, tmp_path)
    edit_one_digit(folder / "risk.csv")
    pdf_before = (folder / "report.pdf").read_bytes()
    capsys.readouterr()
    assert main(["report", str(folder)]) == 2
    err = capsys.readouterr().err
    assert "risk.csv" in err and "--accept-edits" in err and "Traceback" not in err
    assert (folder / "report.pdf").read_bytes() == pdf_before  # nothing written
    assert not list(tmp_path.glob(".copy.*"))  # no lock or partial file left
    assert main(["verify", str(folder)]) == 1
    out = capsys.readouterr().out
    assert "risk.csv: changed since impact wrote it" in out and "NOT VERIFIED" in out
    # with the documented option the report is built, says so on page 1, and verify still refuses it
    assert main(["report", str(folder), "--accept-edits"]) == 0
    assert "WARNING" in capsys.readouterr().err
    assert main(["verify", str(original), "--pdf", str(folder / "report.pdf")]) == 1
    assert "built from files edited after the run (risk.csv)" in capsys.readouterr().out


def test_verify_names_a_missing_an_added_file_and_a_pdf_of_another_folder(assessed, tmp_path, capsys):
    case, original = assessed
    folder = copy_of(original, tmp_path)
    (folder / "bands.csv").unlink()
    (folder / "extra.csv").write_text("a,b\n1,2\n")
    (folder / "notes.txt").write_text("the user's own notes\n")
    capsys.readouterr()
    assert main(["verify", str(folder)]) == 1
    out = capsys.readouterr().out
    assert "bands.csv: listed in inventory.json but missing" in out
    assert "extra.csv: a data file inventory.json does not list" in out and "not checked: notes.txt" in out
    # a report of another run (another seed) does not match this folder
    other = tmp_path / "other"
    assert main(["assess", str(case), "--out", str(other), "--seed", "11", "--no-report", *FLAGS]) == 0
    capsys.readouterr()
    assert main(["verify", str(other), "--pdf", str(original / "report.pdf")]) == 1
    assert "the PDF was not made from this folder" in capsys.readouterr().out
    (tmp_path / "plain.pdf").write_bytes(b"%PDF-1.7\n%%EOF\n")
    assert main(["verify", str(original), "--pdf", str(tmp_path / "plain.pdf")]) == 1
    assert "states no inventory hash" in capsys.readouterr().out


# ----------------------------------------------------------------------------- reused ensembles

@pytest.fixture(scope="module")
def calibrated(tmp_path_factory):
    """An ensemble folder of a small case without data (rejection draws: quick)."""
    root = tmp_path_factory.mktemp("ensemble")
    case = write_case(root, decline_case(40))
    assert main(["calibrate", str(case), "--out", str(root / "post"), "--quiet", "--workers", "1"]) == 0
    return case, root / "post"


def assess_with(case, ensemble, out, capsys) -> tuple[int, str]:
    capsys.readouterr()
    code = main(["assess", str(case), "--ensemble", str(ensemble), "--out", str(out), *FLAGS, "--no-report"])
    return code, capsys.readouterr().err


def rewrite(folder: Path, **arrays):
    """Replace arrays of ensemble.npz and record the new file in the inventory (a consistent forgery:
    the checks of shape and format must catch it, not the hash)."""
    from impact.store.outfolder import write_inventory

    with np.load(folder / "ensemble.npz") as z:
        data = {k: z[k] for k in z.files}
    data.update(arrays)
    np.savez(folder / "ensemble.npz", **data)
    write_inventory(folder)


def test_a_damaged_or_foreign_ensemble_is_refused_naming_the_reason(calibrated, tmp_path, capsys):
    case, post = calibrated
    with np.load(post / "ensemble.npz") as z:
        today, unit = z["today"], z["unit"]
    cases = {
        "truncated": (lambda f: (f / "ensemble.npz").write_bytes((post / "ensemble.npz").read_bytes()[:300]),
                      "altered or damaged"),
        "one byte altered": (lambda f: (f / "ensemble.npz").write_bytes(
            (lambda b: b[:-40] + bytes([b[-40] ^ 1]) + b[-39:])((post / "ensemble.npz").read_bytes())),
                             "altered or damaged"),
        # the segmentation fault of a state array with another number of columns
        "wider state": (lambda f: rewrite(f, today=np.repeat(today, 3, axis=1)), "state columns"),
        "narrower unit": (lambda f: rewrite(f, unit=np.ascontiguousarray(unit[:, :0])), "uncertain parameters"),
        "float32 state": (lambda f: rewrite(f, today=today.astype(np.float32)), "must be float64"),
        "negative state": (lambda f: rewrite(f, today=-today), "negative or non-finite"),
        "another format": (lambda f: rewrite(f, format=np.int64(7)), "format 7"),
        "truncated, no inventory": (lambda f: ((f / "inventory.json").unlink(), (f / "ensemble.npz").write_bytes(
            (post / "ensemble.npz").read_bytes()[:300])), "truncated or damaged"),
    }
    for k, (name, (damage, words)) in enumerate(cases.items()):
        folder = tmp_path / f"post{k}"
        shutil.copytree(post, folder)
        damage(folder)
        code, err = assess_with(case, folder, tmp_path / f"out{k}", capsys)
        assert code == 2 and words in err and "Traceback" not in err and err.count("\n") == 1, (name, err)
        assert not (tmp_path / f"out{k}").exists(), name
    # another case (its file changed) is refused by the case's hash
    d = decline_case(40)
    d["case"]["title"] = "another"
    other = write_case(tmp_path, d, name="other.toml")
    code, err = assess_with(other, post, tmp_path / "out-other", capsys)
    assert code == 2 and "another version of the case file" in err
    # the untouched ensemble is still accepted
    code, _ = assess_with(case, post, tmp_path / "out-ok", capsys)
    assert code == 0


def test_an_altered_pdf_is_detected_by_its_recorded_hash(assessed, tmp_path, capsys):
    _, original = assessed
    line = (original / "report.pdf.sha256").read_text()
    assert line == f"{hashlib.sha256((original / 'report.pdf').read_bytes()).hexdigest()}  report.pdf\n"
    altered = tmp_path / "attached.pdf"
    altered.write_bytes((original / "report.pdf").read_bytes() + b"%% a note added\n")  # still states the hash
    capsys.readouterr()
    assert main(["verify", str(original), "--pdf", str(altered)]) == 1
    assert "differs from the report.pdf impact wrote here" in capsys.readouterr().out
