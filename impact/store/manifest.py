"""The manifest of an assessment: what was run, on what, and what the report needs of the case.

One schema, written and read in one place: :class:`Manifest` and its parts are frozen
dataclasses; :meth:`Manifest.to_json` gives the ``manifest.json`` object and
:meth:`Manifest.from_json` reads one back, refusing a missing field or a value of the wrong type
with a :class:`ReadError` that names the field (``species[2].role``). Fields with a default may be
absent from an older or hand-edited file.
"""

from __future__ import annotations

import dataclasses
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path

from impact.errors import ReadError


@dataclass(frozen=True)
class CaseRecord:
    """The case file the assessment read."""

    path: str
    sha256: str
    title: str
    analyst: str = ""
    description: str = ""
    invented: bool = False


@dataclass(frozen=True)
class Counts:
    """Draws and members: wanted, tried, kept, and why the others were set aside.

    ``failed_by_option`` maps ``baseline`` and each option to counts of numerically failed
    members (``failed`` and one entry per failure reason).
    """

    wanted: int
    tried: int
    kept: int
    failed: int = 0
    extinct: int = 0
    out_of_range: int = 0
    failed_by_option: dict[str, dict[str, int]] = field(default_factory=dict)


@dataclass(frozen=True)
class SpeciesRecord:
    name: str
    role: str
    unit: str = ""
    quasi_extinction: float = 0.0
    outbreak: float | None = None
    generation_time: float | None = None
    present: bool = True
    growth: str = "logistic"
    material_change: float = 0.2


@dataclass(frozen=True)
class OptionRecord:
    name: str
    interventions: tuple[str, ...]
    touches: tuple[str, ...]
    description: str = ""


@dataclass(frozen=True)
class ObjectiveRecord:
    name: str
    species: str
    measure: str
    horizon: float
    requirement: str
    bound: float
    event: str = ""
    description: str = ""
    level: float | None = None  # the abundance level of an abundance objective (drawn on its species' plot)


@dataclass(frozen=True)
class Judgement:
    """The case's levels of a material change and of a thin run, and the likelihood scale."""

    material_change: float
    material_risk: float
    min_members: int
    likelihood_scale: str = ""


@dataclass(frozen=True)
class InterventionRecord:
    name: str
    kind: str = ""
    species: str = ""
    start: float = 0.0
    end: float = 0.0
    description: str = ""
    schedule: str = ""


@dataclass(frozen=True)
class InteractionRecord:
    """Who acts on whom, for the food-web diagram (``from`` and ``to`` in the JSON)."""

    kind: str
    actor: str
    target: str
    response: str | None = None


@dataclass(frozen=True)
class MonitoringRecord:
    """A monitoring series the calibration weighed (its values are in ``calibration/``)."""

    species: str
    kind: str
    error: str
    observations: int
    first: float
    last: float
    file: str | None = None
    source: str = ""


@dataclass(frozen=True)
class ChangeLimitRecord:
    """A declared limit on a species' change between times (``None``: no limit that way)."""

    species: str
    up_at_most: float | None
    down_at_most: float | None
    step: float
    start: float
    end: float
    source: str = ""


# JSON keys that are not the field's name (``from`` is a Python keyword)
JSON_KEYS = {InteractionRecord: {"actor": "from", "target": "to"}}


@dataclass(frozen=True)
class Manifest:
    """``manifest.json`` of an assessment.

    ``sensitivity`` and ``execution`` are short summaries of those stages (their full records
    are ``sensitivity/sensitivity.json`` and the executor's description); ``calibration`` is the
    sampler's record (which sampler built the ensemble, its simulations and acceptance; see
    :meth:`impact.ensemble.calibrate.Calibration.record`); ``None`` when absent.
    """

    case: CaseRecord
    counts: Counts
    time_unit: str
    horizons: tuple[float, ...]
    species: tuple[SpeciesRecord, ...]
    options: tuple[OptionRecord, ...]
    objectives: tuple[ObjectiveRecord, ...]
    judgement: Judgement
    tool: str = "impact"
    version: str = ""
    command: tuple[str, ...] = ()
    started_utc: str = ""
    seconds: float = 0.0
    seed: int = 0
    horizon: float = 0.0
    confidence: float = 0.95
    recovery_fraction: float = 0.9
    interventions: tuple[InterventionRecord, ...] = ()
    interactions: tuple[InteractionRecord, ...] = ()
    equations: tuple[str, ...] = ()
    assumptions: tuple[str, ...] = ()
    plausibility: str = ""
    packages: dict[str, str] = field(default_factory=dict)
    platform: str = ""
    stages: tuple[str, ...] = ()
    caution: str = ""
    sensitivity: dict | None = None
    execution: dict | None = None
    monitoring: tuple[MonitoringRecord, ...] = ()
    change_limits: tuple[ChangeLimitRecord, ...] = ()
    calibration: dict | None = None

    @property
    def option_names(self) -> list[str]:
        return [o.name for o in self.options]

    @property
    def roles(self) -> dict[str, str]:
        return {s.name: s.role for s in self.species}

    def to_json(self) -> dict:
        """The JSON object written as ``manifest.json``."""
        return _to_json(self)

    @classmethod
    def from_json(cls, data, path: Path | str = "manifest.json") -> "Manifest":
        """Read a ``manifest.json`` object, refusing a missing field or a wrong type (:class:`ReadError`)."""
        m = _from_json(cls, data, str(path), "")
        if not m.horizons:
            raise ReadError(str(path), "horizons", "must list at least one horizon")
        return m


def _to_json(obj):
    if dataclasses.is_dataclass(obj):
        keys = JSON_KEYS.get(type(obj), {})
        return {keys.get(f.name, f.name): _to_json(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, (list, tuple)):
        return [_to_json(x) for x in obj]
    if isinstance(obj, dict):
        return {k: _to_json(v) for k, v in obj.items()}
    return obj



def _from_json(tp, value, path: str, where: str):
    """``value`` as type ``tp`` (a dataclass, tuple[X, ...], dict, X | None, or a plain type)."""
    def refuse(what: str):
        raise ReadError(path, where or "(the whole file)", f"must be {what}, got {type(value).__name__}; "
                                                           "the results folder is damaged")

    origin = typing.get_origin(tp)
    if origin in (typing.Union, types.UnionType):
        options = typing.get_args(tp)
        if value is None and type(None) in options:
            return None
        return _from_json(next(o for o in options if o is not type(None)), value, path, where)
    if dataclasses.is_dataclass(tp):
        if not isinstance(value, dict):
            refuse("an object")
        hints = typing.get_type_hints(tp)
        keys = JSON_KEYS.get(tp, {})
        kwargs = {}
        for f in dataclasses.fields(tp):
            key = keys.get(f.name, f.name)
            sub = f"{where}.{key}" if where else key
            if key not in value:
                if f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
                    raise ReadError(path, sub, "missing; the results folder is incomplete or damaged")
                continue
            kwargs[f.name] = _from_json(hints[f.name], value[key], path, sub)
        return tp(**kwargs)
    if origin is tuple:
        if not isinstance(value, list):
            refuse("a list")
        item = typing.get_args(tp)[0]
        return tuple(_from_json(item, x, path, f"{where}[{i}]") for i, x in enumerate(value))
    if origin is dict or tp is dict:
        if not isinstance(value, dict):
            refuse("an object")
        return value
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            refuse("a number")
        return float(value)
    if tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            refuse("a whole number")
        return value
    if tp is bool:
        if not isinstance(value, bool):
            refuse("true or false")
        return value
    if tp is str:
        if not isinstance(value, str):
            refuse("text")
        return value
    raise TypeError(f"no reading for {tp!r}")  # a schema this module does not know: a programming error
