"""Writing and reading the results directory, its schema, and the checkpoints of a run.

Outputs are written into a partial sibling folder and moved into place only when complete
(:mod:`impact.store.outfolder`), so an interrupted or failed run never leaves half-written results
behind. :data:`TABLES` and :class:`impact.store.manifest.Manifest` are the schema ``impact report`` checks a
results folder against before reading a number from it.
"""

from __future__ import annotations

import json
import os
import shutil
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from impact.errors import ReadError, SettingError, WriteError
from impact.run.interrupts import held
from impact.store.manifest import Manifest


FLOAT_FORMAT = "%.6g"  # 6 significant digits in every table


def write_csv(frame: pd.DataFrame, path: Path):
    """Write ``frame`` as CSV (no index, floats to 6 significant digits, NaN as an empty field).

    Frames of plain columns (float, integer, bool, text) are formatted here, column by column,
    which gives pandas' bytes about three times faster (large members tables at 100,000
    members); any other column type goes through pandas.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    if len(frame.columns) == 0 and table_key(path) in TABLES:
        # a table with nothing to list (no uncertain parameter, no stage rows) keeps its header, so that
        # it reads back as an empty table rather than as a damaged file
        frame = pd.DataFrame(columns=list(TABLES[table_key(path)][0]))
    text = csv_text(frame)
    if text is None:
        frame.to_csv(path, index=False, float_format=FLOAT_FORMAT)
    else:
        with open(path, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)


def _csv_field(text: str) -> str:
    # the csv module's minimal quoting with pandas' "\n" line ends (texts holding "\r", whose
    # quoting differs between Python versions, are left to pandas)
    if any(c in text for c in ',"\n'):
        return '"' + text.replace('"', '""') + '"'
    return text


def _column_values(col: pd.Series) -> tuple[str, list] | None:
    """A column as (its row-format field, its values ready for it), or None for pandas' path."""
    kind = col.dtype.kind
    if kind == "f":
        return FLOAT_FORMAT, col.tolist()
    if kind in "iub":
        return "%s", col.tolist()
    if kind != "O":
        return None
    values = col.tolist()
    try:
        distinct = set(values)
    except TypeError:  # unhashable cells
        return None
    if not all(type(v) is str and "\r" not in v for v in distinct):
        return None
    # results columns hold few distinct texts (options, species, statuses): quote each once
    fields = {v: _csv_field(v) for v in distinct}
    if any(fields[v] is not v for v in distinct):
        values = [fields[v] for v in values]
    return "%s", values


def csv_text(frame: pd.DataFrame) -> str | None:
    """The CSV text pandas' ``to_csv(index=False, float_format=FLOAT_FORMAT)`` writes for a frame of
    plain columns, or None when a column is of another kind (or the column names are not unique
    strings).

    Each row is one ``%`` formatting of a row template (one Python operation a row, not one a
    field); the rows holding a NaN, which pandas writes as an empty field, are formatted field by field.
    """
    names = list(frame.columns)
    if (len(names) < 2 or not all(type(n) is str and "\r" not in n for n in names)
            or len(set(names)) != len(names)):
        return None  # (a one-column row of an empty text is quoted by the csv module: left to pandas)
    fields, cols, gaps = [], [], np.zeros(len(frame), bool)
    for name in names:
        column = _column_values(frame[name])
        if column is None:
            return None
        fields.append(column[0])
        cols.append(column[1])
        if column[0] == FLOAT_FORMAT:
            gaps |= np.isnan(frame[name].to_numpy())
    template = ",".join(fields)
    lines = [",".join(_csv_field(n) for n in names)]
    lines += [template % row for row in zip(*cols)]
    for i in np.flatnonzero(gaps):
        lines[i + 1] = ",".join("" if f == FLOAT_FORMAT and c[i] != c[i] else f % c[i] for f, c in zip(fields, cols))
    return "\n".join(lines) + "\n"


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


def read_manifest(results: Path) -> Manifest:
    """``manifest.json`` of a results folder, read into a :class:`impact.store.manifest.Manifest`."""
    path = Path(results) / "manifest.json"
    try:
        manifest = json.loads(path.read_bytes().decode("utf-8"))
    except FileNotFoundError:
        raise ReadError(str(results), "manifest.json", "not found; point at a directory written by `impact assess`") from None
    except UnicodeDecodeError as exc:
        raise ReadError(str(path), "", f"is not UTF-8 text (byte {exc.start}); the results folder is damaged") from None
    except json.JSONDecodeError as exc:
        raise ReadError(str(path), "", f"is not valid JSON ({exc})") from None
    except OSError as exc:
        raise ReadError(str(path), "", f"cannot be read ({exc.strerror or exc})") from None
    return Manifest.from_json(manifest, path)


# ----------------------------------------------------------------------------- schema

# Results tables: relative path -> (columns that must be there, those of them that hold numbers).
# Stage tables are optional (the stage may not have run); when present they must match.
# Row labels the decision stage writes into the objective column of sensitivity/studies.csv and
# sensitivity/weighing.csv, and the report reads back (defined once, here, beside the schema)
VALUED_TOGETHER = "valued objectives together"
WEIGHTED = "weighted objectives"

# columns of eradication.csv and eradication_members.csv (written by impact.risk.eradication; meanings in
# impact.store.dictionary)
ERADICATION_COLUMNS = ("option", "species", "horizon", "gone_below", "unit", "chance_gone", "gone_low", "gone_high",
                       "chance_reinvaded", "chance_success", "success_low", "success_high", "interval", "level", "n",
                       "detection_mean", "confidence", "surveys_needed", "absence_reached", "survey")
ERADICATION_MEMBER_COLUMNS = ("member", "option", "species", "gone_at", "detection", "arrival_rate", "establishment")
TABLES = {
    "eradication.csv": (ERADICATION_COLUMNS, tuple(c for c in ERADICATION_COLUMNS
                                                   if c not in ("option", "species", "unit", "interval", "survey"))),
    "calibration/posterior.csv": (("parameter", "prior_q05", "prior_q50", "prior_q95", "posterior_q05",
                                   "posterior_q50", "posterior_q95", "contraction", "informed"),
                                  ("prior_q05", "prior_q50", "prior_q95", "posterior_q05", "posterior_q50",
                                   "posterior_q95", "contraction")),
    "calibration/generations.csv": (("generation", "tolerance", "temperature", "ess", "acceptance", "steps",
                                     "simulations"), ("generation", "tolerance", "temperature", "ess", "acceptance",
                                                      "steps", "simulations")),
    "calibration/predictive.csv": (("species", "time", "observed", "kind", "q05", "q25", "q50", "q75", "q95"),
                                   ("time", "observed", "q05", "q25", "q50", "q75", "q95")),
    "risk.csv": (("option", "species", "metric", "horizon", "value", "low", "high", "interval", "level", "unit", "n"),
                 ("horizon", "value", "low", "high", "level", "n")),
    "effects.csv": (("option", "species", "role", "direct", "metric", "horizon", "statistic", "value", "low", "high",
                     "interval", "level", "n", "threshold"), ("horizon", "value", "low", "high", "level", "n")),
    "objectives.csv": (("objective", "option", "species", "measure", "horizon", "event", "requirement", "bound",
                        "statistic", "value", "low", "high", "interval", "level", "n", "status"),
                       ("horizon", "bound", "value", "low", "high", "level", "n")),
    "comparisons.csv": (("objective", "option", "versus", "statistic", "value", "low", "high", "interval", "level",
                         "n"), ("value", "low", "high", "level", "n")),
    "sensitivity/drivers.csv": (("option", "output", "species", "parameter", "value", "low", "high", "interval",
                                 "level", "n", "conditional_on"), ("value", "low", "high", "level", "n")),
    "sensitivity/information.csv": (("objective", "parameter", "kind", "value", "low", "high", "interval", "level",
                                     "n", "best_choice", "best_chance", "unit"),
                                    ("value", "low", "high", "level", "n", "best_chance")),
    "sensitivity/studies.csv": (("study", "measures", "target", "error", "samples", "objective", "evsi", "low", "high",
                                 "distinguishable", "ceiling", "ceiling_low", "ceiling_high", "ceiling_of", "cost",
                                 "cost_unit", "value_scale", "enbs", "enbs_low", "enbs_high", "worth_cost", "interval",
                                 "level", "n", "unit"),
                                ("samples", "evsi", "low", "high", "ceiling", "ceiling_low", "ceiling_high", "cost",
                                 "value_scale", "enbs", "enbs_low", "enbs_high", "level", "n")),
    "sensitivity/study_sizes.csv": (("study", "objective", "samples", "declared", "evsi", "low", "high", "ceiling",
                                     "unit", "n"), ("samples", "evsi", "low", "high", "ceiling", "n")),
    "sensitivity/weighing.csv": (("option", "objective", "statistic", "value", "low", "high", "mc_se", "rank", "unit",
                                  "level", "n"), ("value", "low", "high", "mc_se", "rank", "level", "n")),
    "sensitivity/budget.csv": (("rank", "options", "interventions", "cost", "cost_low", "cost_high", "budget",
                                "chance_over_budget", "benefit", "benefit_basis", "method", "cost_unit", "benefit_unit",
                                "level", "n"), ("rank", "cost", "cost_low", "cost_high", "budget", "chance_over_budget",
                                                "benefit", "level", "n")),
    "bands.csv": (("option", "species", "time", "q05", "q25", "q50", "q75", "q95"),
                  ("time", "q05", "q25", "q50", "q75", "q95")),
    "priors.csv": (("name", "distribution", "arguments", "unit", "source", "description"), ()),
    "sensitivity/indices.csv": (("option", "metric", "species", "parameter", "S1", "S1_conf", "ST", "ST_conf"),
                                ("S1", "S1_conf", "ST", "ST_conf")),
    "sensitivity/ranking.csv": (("option", "metric", "species", "rank", "parameter", "ST", "S1"), ("rank", "ST", "S1")),
    "sensitivity/convergence.csv": (("option", "metric", "species", "max_shift", "max_ci_width", "converged"),
                                    ("max_shift", "max_ci_width")),
    "dynamics/regimes.csv": (("option", "member", "regime", "period", "lyapunov", "horizon_time"),
                             ("member", "period", "lyapunov", "horizon_time")),
    "dynamics/regime_shares.csv": (("option", "regime", "share", "count"), ("share", "count")),
    "dynamics/scan.csv": (("parameter", "value", "section_value", "regime", "period", "lyapunov"),
                          ("value", "section_value", "period", "lyapunov")),
    "dynamics/transitions.csv": (("parameter", "from_value", "to_value", "from_regime", "to_regime", "kind"),
                                 ("from_value", "to_value")),
    "press_signs.csv": (("option", "intervention", "pressed", "press", "species", "net", "terms", "weight", "predicted",
                         "basis", "n", "agree", "value", "low", "high", "interval", "level", "increase", "decrease"),
                        ("net", "terms", "weight", "n", "agree", "value", "low", "high", "level", "increase", "decrease")),
    "structures/weights.csv": (("structure", "choices", "prior_weight", "weight", "low", "high", "interval", "level", "members",
                                "n_effective", "evidence"),
                               ("prior_weight", "weight", "low", "high", "level", "members", "n_effective")),
    "structures/choices.csv": (("doubt", "choice", "absent", "prior_weight", "weight", "low", "high", "interval",
                                "level", "members", "n_effective", "evidence"),
                               ("prior_weight", "weight", "low", "high", "level", "members", "n_effective")),
}
# the per-structure tables: the columns of the whole-ensemble table, after a structure column
for _rel in ("risk.csv", "effects.csv", "objectives.csv", "comparisons.csv", "dynamics/regime_shares.csv"):
    TABLES[f"structures/{_rel.split('/')[-1]}"] = (("structure", *TABLES[_rel][0]), TABLES[_rel][1])
del _rel


STAGE_FOLDERS = ("sensitivity", "dynamics", "calibration", "structures")


def table_key(path: Path) -> str:
    """The key of :data:`TABLES` a results file answers to: its name, with its stage folder when it has one."""
    path = Path(path)
    return f"{path.parent.name}/{path.name}" if path.parent.name in STAGE_FOLDERS else path.name


def check_table(frame: pd.DataFrame, path: Path, relative: str):
    """Refuse a results table without the columns the report reads, or with text in a number column.

    ``frame`` holds the table as read, every cell as text (empty for a missing value).
    """
    if relative not in TABLES:
        return
    required, numeric = TABLES[relative]
    missing = [c for c in required if c not in frame.columns]
    if missing:
        raise ReadError(str(path), missing[0], f"column missing (the table needs: {', '.join(required)}); "
                                               "the results folder is damaged")
    for c in numeric:
        cells = frame[c].astype(str)
        bad = cells[(cells != "") & pd.to_numeric(cells, errors="coerce").isna() & (cells.str.lower() != "nan")]
        if len(bad):
            raise ReadError(str(path), c, f"row {int(bad.index[0]) + 2} holds {bad.iloc[0]!r}, not a number; "
                                          "the results folder is damaged")


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
        out = Path(os.path.abspath(out))
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
                    raise SettingError("resume", f"the checkpoints in {self.dir} were written for a different run (differs in: "
                                    f"{', '.join(diff)}); run again without `resume` to start afresh")
            elif self.dir.exists():
                shutil.rmtree(self.dir)
            self.dir.mkdir(parents=True, exist_ok=True)
            if not fp.exists():
                _atomic_write(fp, (json.dumps(self.fingerprint, indent=2) + "\n").encode("utf-8"))
        except OSError as exc:
            raise WriteError(exc.filename or self.dir, f"cannot write checkpoints here ({exc.strerror or exc}); "
                                                       "choose another `out`") from None

    @staticmethod
    def previous(out: Path) -> dict | None:
        """The fingerprint of checkpoints left beside ``out`` by an earlier run, if any."""
        out = Path(os.path.abspath(out))
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
        try:
            # an interrupt inside the zip writer would surface as the writer's own complaint
            with held():
                np.savez(buf, **arrays)
                _atomic_write(self._path(key), buf.getvalue())
        except OSError as exc:
            raise WriteError(self._path(key), f"could not save a checkpoint ({exc.strerror or exc}); "
                                              "the checkpoints already written are intact: free space and rerun "
                                              "with `resume`") from None
        self.saved += 1

    def discard(self):
        """Remove the checkpoints once the results directory is complete."""
        shutil.rmtree(self.dir, ignore_errors=True)


def write_file_atomic(path: Path, data: bytes):
    """Write ``data`` to ``path`` whole or not at all (temporary name, fsync, rename; mode from the umask)."""
    _atomic_write(Path(path), data)


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


# ----------------------------------------------------------------------------- reading back

# columns kept as text when a results table is read back (every other column is a number)
TEXT_COLUMNS = {
    "option", "species", "metric", "unit", "role", "direct", "statistic", "interval", "objective", "measure", "event",
    "requirement", "status", "versus", "output", "best_choice", "parameter", "regime", "name", "distribution", "arguments",
    "source", "description", "conditional_on", "parameter_i", "parameter_j", "from_regime", "to_regime",
    "kind", "failure", "failed", "converged", "uncertain", "reason", "basis", "extinct_species", "extinct",
    "informed", "verdict", "intervention", "pressed", "press", "predicted", "structure", "choices", "doubt", "choice", "absent", "evidence",
    "study", "measures", "target", "error", "distinguishable", "ceiling_of", "cost_unit", "worth_cost", "declared",
    "options", "interventions", "benefit_basis", "method", "benefit_unit",
    "survey",
}

@dataclass
class Results:
    """A results directory read back: the manifest and its tables.

    ``sensitivity`` and ``dynamics`` map file stems to tables (``None`` when the stage did not run).
    """

    path: Path
    manifest: Manifest
    risk: pd.DataFrame
    bands: pd.DataFrame
    priors: pd.DataFrame
    effects: pd.DataFrame
    objectives: pd.DataFrame
    comparisons: pd.DataFrame
    sensitivity: dict | None = None
    dynamics: dict | None = None
    calibration: dict | None = None
    press: pd.DataFrame | None = None  # press_signs.csv (None in folders written before it existed)
    press_record: dict | None = None  # press_signs.json
    structures: dict | None = None  # by file stem: weights, choices, risk, effects, ... (cases with structural doubts)
    eradication: pd.DataFrame | None = None  # eradication.csv (cases with [[surveillance]] only)


def read_table(path: Path) -> pd.DataFrame:
    """Read a results CSV keeping names as text (a species called "NA" stays "NA").

    The table is checked against the results schema (:data:`impact.store.results.TABLES`) first: a
    missing column or text in a number column is refused naming the file and the column.
    """
    path = Path(path)
    relative = table_key(path)
    try:
        df = pd.read_csv(path, dtype=str, keep_default_na=False)
    except FileNotFoundError:
        raise ReadError(str(path.parent), path.name, "not found; point at a directory written by `impact assess`") from None
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise ReadError(str(path), "", f"is not a readable CSV table ({exc})") from None
    except OSError as exc:
        raise ReadError(str(path), "", f"cannot be read ({exc.strerror or exc})") from None
    check_table(df, path, relative)
    for c in df.columns:
        if c not in TEXT_COLUMNS:
            df[c] = pd.to_numeric(df[c].replace("", "nan"), errors="coerce")
    return df


def read_stage(folder: Path) -> dict | None:
    if not folder.is_dir():
        return None
    out = {}
    for p in sorted(folder.iterdir()):
        if p.suffix == ".csv":
            out[p.stem] = read_table(p)
        elif p.suffix == ".json":
            out[p.stem] = read_record(p)
    return out or None


def read_record(p: Path) -> dict:
    """A JSON record of a results folder, refused with the file named when damaged."""
    try:
        return json.loads(p.read_bytes().decode("utf-8"))
    except FileNotFoundError:
        raise ReadError(str(p.parent), p.name, "not found; the results folder is incomplete") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ReadError(str(p), "", f"is not valid UTF-8 JSON ({exc}); the results folder is damaged") from None
    except OSError as exc:
        raise ReadError(str(p), "", f"cannot be read ({exc.strerror or exc})") from None


def load_results(path) -> Results:
    """Read a results directory written by ``impact assess``, checked against the results schema."""
    path = Path(path)
    if not path.is_dir():
        raise ReadError(str(path), "", "is not a results directory (run `impact assess` first)")
    manifest = read_manifest(path)
    press = read_table(path / "press_signs.csv") if (path / "press_signs.csv").is_file() else None
    record = read_record(path / "press_signs.json") if press is not None else None
    return Results(path, manifest, read_table(path / "risk.csv"), read_table(path / "bands.csv"),
                   read_table(path / "priors.csv"), read_table(path / "effects.csv"),
                   read_table(path / "objectives.csv"), read_table(path / "comparisons.csv"),
                   read_stage(path / "sensitivity"), read_stage(path / "dynamics"), read_stage(path / "calibration"),
                   press, record, read_stage(path / "structures"),
                   read_table(path / "eradication.csv") if (path / "eradication.csv").is_file() else None)


def risk_row(risk: pd.DataFrame, option: str, species: str, metric: str, horizon: float):
    r = risk[(risk.option == option) & (risk.species == species) & (risk.metric == metric)
             & np.isclose(risk.horizon, horizon)]
    return None if r.empty else r.iloc[0]


ENSEMBLE_FILE = "ensemble.npz"
ENSEMBLE_ARRAYS = ("draws", "unit", "today")
# Layout of ensemble.npz: 1 = draws (M,) int, unit (M, D) float in (0, 1), today (M, n_state) float ≥ 0, format ().
# A file without ``format`` was written before formats were numbered and has layout 1.
ENSEMBLE_FORMAT = 1


def write_ensemble(folder: Path, draws: np.ndarray, unit: np.ndarray, today: np.ndarray) -> None:
    """A posterior ensemble as plain arrays (no pickles): draw numbers (M,), unit rows (M, D), states today (M, n)."""
    buf = __import__("io").BytesIO()
    np.savez(buf, draws=draws, unit=unit, today=today, format=np.int64(ENSEMBLE_FORMAT))
    Path(folder).mkdir(parents=True, exist_ok=True)
    write_file_atomic(Path(folder) / ENSEMBLE_FILE, buf.getvalue())


def read_ensemble(folder: Path, parameters: int | None = None, state: int | None = None) -> dict[str, np.ndarray]:
    """Read ``ensemble.npz`` of a folder written by ``impact calibrate``, refusing a damaged one.

    Parameters
    ----------
    parameters, state : int, optional
        The case's uncertain parameters D and state columns n: ``unit`` must be (M, D) and
        ``today`` (M, n) (the compiled engine trusts the state's width).

    Raises
    ------
    ReadError
        Naming the file, the array and the reason: not a zip archive of arrays (truncated or
        overwritten), another format, an array missing, of another dtype or shape, or values
        outside their range.
    """
    import zipfile
    import zlib

    path = Path(folder) / ENSEMBLE_FILE
    try:
        with np.load(path, allow_pickle=False) as z:
            fmt = int(z["format"]) if "format" in z.files else 1
            if fmt != ENSEMBLE_FORMAT:
                raise ReadError(str(path), "format", f"is ensemble format {fmt}; this impact reads format "
                                                     f"{ENSEMBLE_FORMAT}: calibrate the case again with this version")
            arrays = {k: z[k] for k in ENSEMBLE_ARRAYS}
    except FileNotFoundError:
        raise ReadError(str(folder), ENSEMBLE_FILE, "not found; point at a folder written by `impact calibrate`") from None
    except IsADirectoryError:
        raise ReadError(str(path), "", "is a folder, not an ensemble file") from None
    except KeyError as exc:
        raise ReadError(str(path), str(exc).strip("'\""), "array missing; the ensemble folder is damaged") from None
    except (ValueError, OSError, EOFError, TypeError, zipfile.BadZipFile, zlib.error) as exc:
        raise ReadError(str(path), "", f"is not a readable ensemble (truncated or damaged: {exc})") from None
    draws, unit, today = arrays["draws"], arrays["unit"], arrays["today"]
    if draws.ndim != 1 or draws.dtype.kind not in "iu" or (draws < 0).any():
        raise ReadError(str(path), "draws", "must be draw numbers (whole numbers ≥ 0, one per member); the ensemble "
                                            "folder is damaged")
    M = draws.shape[0]
    for name, a, width in (("unit", unit, parameters), ("today", today, state)):
        if a.dtype != np.float64 or a.ndim != 2 or a.shape[0] != M:
            raise ReadError(str(path), name, f"must be float64 of shape ({M}, {width or 'columns'}) for {M} members, "
                                             f"got {a.dtype} {a.shape}; the ensemble folder is damaged")
        if width is not None and a.shape[1] != width:
            what = "uncertain parameters" if name == "unit" else "state columns (species and carrion)"
            raise ReadError(str(path), name, f"has {a.shape[1]} columns, but the case has {width} {what}: the "
                                             "ensemble was written for another case")
    if not np.isfinite(unit).all() or ((unit <= 0) | (unit >= 1)).any():
        raise ReadError(str(path), "unit", "values outside (0, 1); the ensemble folder is damaged")
    if not np.isfinite(today).all() or (today < 0).any():
        raise ReadError(str(path), "today", "holds negative or non-finite states; the ensemble folder is damaged")
    return {k: np.ascontiguousarray(v) for k, v in arrays.items()}
