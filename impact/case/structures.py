"""Structural doubts in a case: interactions that may not exist, interactions with alternative forms,
and whole alternative webs, each with a prior weight.

An ``[[interactions]]`` entry may carry a ``doubt`` table::

    doubt = { name = "rat predation on skinks", label = "rats eat skinks",
              exists = 0.7, absent = "rats do not eat skinks" }
    doubt = { label = "the cats' response to rats saturates", weight = 0.6, alternatives = [
              { label = "the cats' response to rats is sigmoid", weight = 0.4, response = "holling3" } ] }

Each doubt has choices (the form as written, each alternative form, and the link's absence), and the
case's structures are every combination of choices (their prior weights multiply), or the webs a
``[[webs]]`` table names with their own weights. Every structure's interactions are read and checked
by the ordinary reader, so an alternative is validated exactly like a written interaction.

The case the later stages receive holds the union of every structure's interactions. A numeric field
that differs between structures (the attack rate of a link that one structure lacks is 0 there) names
a *switch*: :func:`impact.ensemble.sample.parameter_values` gives it, per member, the value of that member's
structure. So one compiled kernel serves every structure, a switched-off link costs one multiplication
by zero, and a case without doubts is read exactly as before.
"""

from __future__ import annotations

import itertools
import re
from dataclasses import dataclass
from typing import Any

import numpy as np

from impact.case.reader import Reader, Table, read_interactions
from impact.case.types import Competition, Feeding, Quantity, Species
from impact.errors import CaseError

MAX_STRUCTURES = 64  # every structure is a share of the members; more would leave each too few (common practice)
FEEDING_KINDS = ("predation", "scavenging", "alternative-food")
SWITCH_MARK = " [by structure]"  # switch names: no declared parameter can end with it (checked)
STRUCTURE_KEY = "structure" + SWITCH_MARK  # each member's structure index among the parameter values
# fields that a structure lacking the interaction sets to 0 (the term vanishes); other fields keep a
# harmless value there (a half-saturation of 0 would divide 0 by 0)
ZEROED = {"attack_rate", "coefficient", "max_benefit"}


@dataclass(frozen=True)
class Choice:
    """One way a doubtful interaction may be: ``label`` in plain words, ``weight`` its prior weight."""

    label: str
    weight: float
    absent: bool = False


@dataclass(frozen=True)
class Doubt:
    """A doubt about interaction ``interaction`` (its index in ``[[interactions]]``): choice 0 is the
    interaction as written, then its alternatives, then (when it may not exist) its absence."""

    name: str
    interaction: int
    choices: tuple[Choice, ...]


@dataclass(frozen=True)
class Structure:
    """One web: the choice made for every doubt (indices into each doubt's choices)."""

    name: str
    weight: float
    choices: tuple[int, ...]


@dataclass(frozen=True)
class Switch:
    """A numeric field whose value depends on the structure: ``values[k]`` under structure k."""

    name: str
    values: tuple[Quantity, ...]


@dataclass(frozen=True)
class Structures:
    """The structural doubts of a case and the webs they make (prior weights sum to 1)."""

    doubts: tuple[Doubt, ...]
    structures: tuple[Structure, ...]
    switches: tuple[Switch, ...]
    declared: bool  # the webs were named in [[webs]] (not every combination of the doubts)

    @property
    def weights(self) -> np.ndarray:
        """Prior weights: (K,)."""
        return np.array([s.weight for s in self.structures])

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(s.name for s in self.structures)

    def mode(self) -> int:
        """The structure of highest prior weight (the first of equals)."""
        return int(np.argmax(self.weights))

    def index(self, u: np.ndarray) -> np.ndarray:
        """Structure of each member from its structure uniform, in proportion to the prior weights: (M,) int."""
        edges = np.cumsum(self.weights)[:-1]
        return np.searchsorted(edges, np.asarray(u, float), side="right").astype(np.int64)

    def parameters_used(self) -> set[str]:
        """Declared parameters that some structure's switched fields name."""
        return {v for sw in self.switches for v in sw.values if isinstance(v, str)}


def _kind(item: Any) -> str | None:
    if isinstance(item, dict):
        k = item.get("kind", item.get("type"))
        return k if isinstance(k, str) else None
    return None


def _read_doubt(r: Reader, i: int, raw: Any, item: dict) -> tuple[Doubt, list[dict | None]]:
    """A ``doubt`` table: the Doubt and, per choice, the interaction's raw table (None when absent)."""
    base = f"interactions[{i}].doubt"
    t = Table(r, raw, base)
    label = t.get("label", kind="str").strip()
    name = t.get("name", label, "str").strip()
    if not label or not name:
        r.fail(base, "label and name must be plain words, not empty")
    exists = t.number("exists", 1.0, low=0, high=1, low_open=True)
    alternatives = t.get("alternatives", [], "list")
    if alternatives:
        weight = t.number("weight", low=0, low_open=True)
    else:
        weight = t.number("weight", 1.0, low=0, low_open=True)
    absent = t.get("absent", None, "str") if exists < 1.0 else None
    if exists < 1.0 and (absent is None or not absent.strip()):
        r.fail(f"{base}.absent", "is required when exists < 1: plain words for the web without this "
                                 "interaction, e.g. \"rats do not eat skinks\"")
    t.done()
    if exists == 1.0 and not alternatives:
        r.fail(base, "declares no doubt: give exists < 1 (the interaction may not exist) and/or alternatives "
                     "(other forms it may take)")
    choices, tables = [(label, weight)], [dict(item)]
    fields = set(item) - {"kind", "type"}
    for k, alt in enumerate(alternatives):
        ab = f"{base}.alternatives[{k}]"
        if not isinstance(alt, dict):
            r.fail(ab, f"must be a table, got {type(alt).__name__}")
        at = Table(r, alt, ab)
        a_label = at.get("label", kind="str").strip()
        a_weight = at.number("weight", low=0, low_open=True)
        overrides = dict(at.data)
        for key in overrides:
            if key in ("kind", "type", "doubt", "predator", "prey", "scavenger", "consumer", "species",
                       "competitor", "beneficiary", "partner"):
                r.fail(f"{ab}.{key}", "an alternative form changes how an interaction acts, not who takes part "
                                      "or its kind; declare another interaction with its own doubt instead")
        if not overrides:
            r.fail(ab, "changes nothing: give the fields that differ from the interaction as written "
                       "(e.g. response, attack_rate, interference, max_benefit)")
        if not a_label:
            r.fail(f"{ab}.label", "must be plain words, not empty")
        merged = dict(item)
        merged.update(overrides)
        merged["_overrides"] = tuple(overrides)  # dropped before the table is read (see _consumer_interference)
        choices.append((a_label, a_weight))
        tables.append(merged)
        fields |= set(overrides)
    total = sum(w for _, w in choices)
    out = [Choice(lab, exists * w / total) for lab, w in choices]
    if exists < 1.0:
        out.append(Choice(absent.strip(), 1.0 - exists, absent=True))
        tables.append(None)
    labels = [c.label for c in out]
    if any(";" in lab for lab in labels):
        r.fail(base, f"labels are plain words without ';' (it separates a web's choices), got {labels}")
    if len(set(labels)) < len(labels):
        r.fail(base, f"choices must have different labels, got {labels}")
    return Doubt(name, i, tuple(out)), tables


def _read_webs(r: Reader, raw: list, doubts: tuple[Doubt, ...]) -> tuple[Structure, ...]:
    """``[[webs]]``: named combinations of choices with their own prior weights (normalised)."""
    by_name = {d.name: (k, d) for k, d in enumerate(doubts)}
    webs, seen = [], set()
    for j, item in enumerate(raw):
        base = f"webs[{j}]"
        t = Table(r, item, base)
        name = t.get("name", kind="str").strip()
        weight = t.number("weight", low=0, low_open=True)
        chosen = Table(r, t.get("choices", {}, "any"), f"{base}.choices")
        t.done()
        picks = [0] * len(doubts)
        for dname in list(chosen.data):
            if dname not in by_name:
                r.fail(f"{base}.choices.{dname}", f"names no doubt; declared doubts: {', '.join(sorted(by_name))}")
            k, d = by_name[dname]
            lab = chosen.get(dname, kind="str")
            labels = [c.label for c in d.choices]
            if lab not in labels:
                r.fail(f"{base}.choices.{dname}", f"{lab!r} is not a choice of this doubt; choose one of: "
                                                  f"{', '.join(labels)}")
            picks[k] = labels.index(lab)
        if not name or name in seen:
            r.fail(f"{base}.name", f"must be a unique, non-empty name, got {name!r}")
        if tuple(picks) in {w[2] for w in webs}:
            r.fail(f"{base}.choices", "makes the same choices as an earlier web")
        seen.add(name)
        webs.append((name, weight, tuple(picks)))
    total = sum(w for _, w, _ in webs)
    return tuple(Structure(n, w / total, c) for n, w, c in webs)


def _combinations(r: Reader, doubts: tuple[Doubt, ...]) -> tuple[Structure, ...]:
    count = int(np.prod([len(d.choices) for d in doubts]))
    if count > MAX_STRUCTURES:
        r.fail("interactions", f"the doubts make {count} webs; at most {MAX_STRUCTURES} are allowed (each is a share "
                               "of the members): name the webs worth weighing in [[webs]]")
    out = []
    for picks in itertools.product(*(range(len(d.choices)) for d in doubts)):
        w = float(np.prod([d.choices[c].weight for d, c in zip(doubts, picks)]))
        out.append(Structure("; ".join(d.choices[c].label for d, c in zip(doubts, picks)), w, tuple(picks)))
    return tuple(out)


def _origins(raw: list[dict]) -> dict[str, list[int]]:
    """For each entry list (feeding, competition, mutualism), the index into ``raw`` of each entry."""
    out = {"feeding": [], "competition": [], "mutualism": []}
    for k, item in enumerate(raw):
        kind = _kind(item)
        out["feeding" if kind in FEEDING_KINDS else kind].append(k)
    return out


def _shape(entry) -> tuple:
    if isinstance(entry, Feeding):
        return ("feeding", entry.kind, entry.consumer, entry.resource, entry.response)
    if isinstance(entry, Competition):
        return ("competition", entry.species, entry.competitor)
    return ("mutualism", entry.beneficiary, entry.partner, entry.obligate)


def _numeric(entry) -> list[str]:
    skip = {"kind", "consumer", "resource", "response", "species", "competitor", "beneficiary", "partner", "obligate"}
    return [f for f in entry.__dataclass_fields__ if f not in skip]


def _union(r: Reader, parsed: list[tuple], origins: list[dict], structures, doubts, taken: set[str]):
    """The union of every structure's interactions, with switches for the fields that differ."""
    K = len(structures)
    entries: dict[tuple, dict[int, Any]] = {}  # (origin, shape) -> {structure: entry}
    order: list[tuple] = []
    for s, (lists, orig) in enumerate(zip(parsed, origins)):
        for group, items in zip(("feeding", "competition", "mutualism"), lists):
            for entry, o in zip(items, orig[group]):
                key = (o, _shape(entry))
                if key not in entries:
                    entries[key] = {}
                    order.append(key)
                entries[key][s] = entry
    order.sort(key=lambda k: k[0])
    switches: list[Switch] = []
    out = {"feeding": [], "competition": [], "mutualism": []}
    for key in order:
        o, shape = key
        per = entries[key]
        first = next(iter(per.values()))
        if shape[0] == "mutualism" and shape[3] and len(per) < K:
            r.fail(f"interactions[{o}].doubt", "an obligate mutualism cannot be absent from some webs and present in "
                                               "others (without its partner the beneficiary has no births at all); "
                                               "doubt a facultative mutualism instead")
        fields = {}
        for f in _numeric(first):
            if f == "interference":  # the consumer's, set below
                fields[f] = first.interference
                continue
            vals = tuple(per[s].__dict__[f] if s in per else (0.0 if f in ZEROED else getattr(first, f))
                         for s in range(K))
            if len(set(vals)) == 1:
                fields[f] = vals[0]
                continue
            who = f"{shape[2]}→{shape[3]} {shape[4]}" if shape[0] == "feeding" else f"{shape[1]}, {shape[2]}"
            name = f"{who} {f}{SWITCH_MARK}"
            while name in taken:
                name = "+" + name
            taken.add(name)
            switches.append(Switch(name, vals))
            fields[f] = name
        out[shape[0]].append(type(first)(**{**first.__dict__, **fields}))
    # interference belongs to the consumer: one value per structure for all of its links
    for consumer in {f.consumer for f in out["feeding"] if f.response == "beddington-deangelis"}:
        vals = []
        for lists in parsed:
            g = [f.interference for f in lists[0] if f.consumer == consumer and f.response == "beddington-deangelis"]
            vals.append(g[0] if g else 0.0)
        if len(set(vals)) == 1:
            q = vals[0]
        else:
            q = f"{consumer} interference{SWITCH_MARK}"
            switches.append(Switch(q, tuple(vals)))
        out["feeding"] = [Feeding(**{**f.__dict__, "interference": q})
                          if f.consumer == consumer and f.response == "beddington-deangelis" else f
                          for f in out["feeding"]]
    return out["feeding"], out["competition"], out["mutualism"], tuple(switches)


CONSUMER_KEYS = ("predator", "scavenger", "consumer")


def _consumer_interference(items: list, chosen: list) -> list:
    """Interference belongs to the consumer: an alternative form that sets it sets it on every
    Beddington–DeAngelis link of that consumer in its web (so "with or without interference" is one doubt)."""
    fixed = {}
    for tab in chosen:
        if tab is not None and "interference" in tab.get("_overrides", ()):
            who = next((tab[k] for k in CONSUMER_KEYS if isinstance(tab.get(k), str)), None)
            fixed[who] = tab["interference"]
    out = []
    for item in items:
        if isinstance(item, dict):
            item = {k: v for k, v in item.items() if k != "_overrides"}
            # a consumer that is not a name is refused by the interaction's own reader
            who = next((item[k] for k in CONSUMER_KEYS if isinstance(item.get(k), str)), None)
            if who in fixed and item.get("response") == "beddington-deangelis":
                item["interference"] = fixed[who]
        out.append(item)
    return out


def read_web(r: Reader, raw: list, raw_webs: list, species: tuple[Species, ...], declared: set[str]):
    """Every ``[[interactions]]`` entry with its doubts, and ``[[webs]]``.

    Returns
    -------
    feeding, competition, mutualism : lists
        The union of every structure's interactions (the interactions as written when there is no doubt).
    structures : Structures or None
        None when the case declares no doubt.
    """
    clean, doubts, tables = [], [], []
    for i, item in enumerate(raw):
        if isinstance(item, dict) and "doubt" in item:
            item = dict(item)
            d, t = _read_doubt(r, i, item.pop("doubt"), item)
            for k, tab in enumerate(t[1:], start=1):
                if tab is not None:
                    tab.pop("doubt", None)
            t[0] = item
            doubts.append(d)
            tables.append(t)
        clean.append(item)
    if not doubts:
        if raw_webs:
            r.fail("webs", "names webs, but no interaction declares a doubt (a `doubt` table in [[interactions]])")
        return (*read_interactions(r, raw, species), None)
    names = [d.name for d in doubts]
    if len(set(names)) < len(names):
        r.fail("interactions", f"doubts must have different names, got {names}")
    bad = [p for p in declared if p.endswith(SWITCH_MARK)]
    if bad:
        r.fail(f"parameters.{bad[0]}", f"parameter names may not end with {SWITCH_MARK!r}")
    doubts = tuple(doubts)
    structures = _read_webs(r, raw_webs, doubts) if raw_webs else _combinations(r, doubts)
    by_interaction = {d.interaction: (k, t) for k, (d, t) in enumerate(zip(doubts, tables))}
    parsed, origins = [], []
    for s in structures:
        items = []
        for i, item in enumerate(clean):
            if i in by_interaction:
                k, t = by_interaction[i]
                item = t[s.choices[k]]
                if item is None:
                    continue
            items.append(item)
        items = _consumer_interference(items, [t[s.choices[k]] for k, t in enumerate(tables) if s.choices[k] > 0])
        positions = [i for i, item in enumerate(clean)
                     if not (i in by_interaction and by_interaction[i][1][s.choices[by_interaction[i][0]]] is None)]
        try:
            parsed.append(read_interactions(r, items, species))
        except CaseError as exc:
            # the web's k-th interaction is the file's positions[k]-th
            field = re.sub(r"^interactions\[(\d+)\]", lambda m: f"interactions[{positions[int(m.group(1))]}]",
                           exc.field)
            raise CaseError(exc.file, field, f"{exc.message} (in the web where {s.name})") from None
        origins.append({g: [positions[k] for k in ks] for g, ks in _origins(items).items()})
    feeding, competition, mutualism, switches = _union(r, parsed, origins, structures, doubts, set(declared))
    return feeding, competition, mutualism, Structures(doubts, structures, switches, bool(raw_webs))


def switch_values(st: Structures, index: np.ndarray, values: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Each switch's value per member under that member's structure ``index`` (M,)."""
    out = {}
    M = index.shape[0]
    for sw in st.switches:
        v = np.empty(M)
        for k, q in enumerate(sw.values):
            sel = index == k
            v[sel] = values[q][sel] if isinstance(q, str) else float(q)
        out[sw.name] = v
    return out
