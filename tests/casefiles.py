"""Small case files written from Python dicts, for tests (a minimal TOML writer)."""

from __future__ import annotations

import copy
from pathlib import Path


def _value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, dict):  # an inline table (inside an array of tables)
        return "{" + ", ".join(f"{_key(k)} = {_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(type(v))


def _key(k: str) -> str:
    return k if k.replace("_", "").replace("-", "").isalnum() else _value(k)


def to_toml(data: dict) -> str:
    lines: list[str] = []

    def table(prefix: str, d: dict):
        scalars = {k: v for k, v in d.items() if not isinstance(v, dict) and not (isinstance(v, list) and v and isinstance(v[0], dict))}
        subs = {k: v for k, v in d.items() if isinstance(v, dict)}
        arrays = {k: v for k, v in d.items() if isinstance(v, list) and v and isinstance(v[0], dict)}
        if prefix and scalars:
            lines.append(f"[{prefix}]")
        for k, v in scalars.items():
            lines.append(f"{_key(k)} = {_value(v)}")
        for k, v in subs.items():
            table(f"{prefix}.{_key(k)}" if prefix else _key(k), v)
        for k, items in arrays.items():
            for item in items:
                lines.append(f"[[{prefix + '.' if prefix else ''}{_key(k)}]]")
                for kk, vv in item.items():
                    lines.append(f"{_key(kk)} = {_value(vv)}")

    table("", data)
    return "\n".join(lines) + "\n"


def write_case(tmp_path: Path, data: dict, name: str = "case.toml") -> Path:
    path = tmp_path / name
    path.write_text(to_toml(data), encoding="utf-8")
    return path


def decline_case(members: int = 400) -> dict:
    """One species in exponential decline with an uncertain rate; a no-effect option."""
    return copy.deepcopy({
        "case": {"title": "decline", "time_unit": "year", "horizon": 40.0, "output_step": 1.0,
                 "spinup": 0.0, "members": members, "seed": 3},
        "parameters": {"r": {"distribution": "uniform", "low": -0.2, "high": -0.05, "unit": "1/year", "source": "test"},
                       "q": {"distribution": "uniform", "low": 0.0, "high": 0.1, "unit": "1/year"}},
        "species": [{"name": "newt", "growth": "exponential", "growth_rate": "r", "initial": 100.0,
                     "quasi_extinction": 10.0}],
        "interventions": [{"name": "harvest", "kind": "press-harvest", "species": "newt", "rate": "q", "start": 0.0, "end": 40.0}],
        "options": [{"name": "harvest", "interventions": ["harvest"]}],
        "risk": {"horizons": [10.0, 20.0, 40.0], "min_members": 10},
    })


def web_case(members: int = 60) -> dict:
    """A four-species web with every interaction type, noise and two options."""
    return copy.deepcopy({
        "case": {"title": "four species", "time_unit": "year", "horizon": 20.0, "output_step": 1.0,
                 "spinup": 30.0, "members": members, "seed": 11},
        "parameters": {
            "grass_r": {"distribution": "uniform", "low": 0.8, "high": 1.2, "unit": "1/year"},
            "fox_a": {"distribution": "triangular", "low": 0.02, "mode": 0.04, "high": 0.06, "unit": "ha/year"},
            "cull": {"distribution": "uniform", "low": 0.2, "high": 0.6, "unit": "fraction"},
        },
        "species": [
            {"name": "grass", "growth": "logistic", "growth_rate": "grass_r", "carrying_capacity": 1000.0, "initial": 800.0,
             "quasi_extinction": 10.0, "noise_sd": 0.1},
            {"name": "hare", "growth": "none", "mortality": 0.2, "initial": 40.0, "quasi_extinction": 1.0, "outbreak": 400.0},
            {"name": "fox", "growth": "none", "mortality": 0.3, "initial": 2.0, "quasi_extinction": 0.05},
            {"name": "beetle", "growth": "none", "mortality": 0.1, "initial": 5.0, "quasi_extinction": 0.1},
        ],
        "carrion": {"decay_rate": 2.0},
        "interactions": [
            {"type": "predation", "predator": "hare", "prey": "grass", "response": "holling2", "attack_rate": 0.002, "handling_time": 0.1, "efficiency": 0.3},
            {"type": "predation", "predator": "fox", "prey": "hare", "response": "holling2", "attack_rate": "fox_a", "handling_time": 0.2, "efficiency": 0.1},
            {"type": "predation", "predator": "fox", "prey": "grass", "response": "holling1", "attack_rate": 0.0001, "efficiency": 0.01},
            {"type": "scavenging", "scavenger": "beetle", "response": "holling3", "attack_rate": 0.1, "handling_time": 0.1, "efficiency": 0.2},
            {"type": "mutualism", "beneficiary": "grass", "partner": "beetle", "max_benefit": 0.2, "half_saturation": 5.0},
        ],
        "interventions": [
            {"name": "fox cull", "kind": "pulse-cull", "species": "fox", "times": [2.0, 4.0], "fraction": "cull", "carcasses_to_carrion": True},
            {"name": "fox removal", "kind": "eradication", "species": "fox", "time": 5.0, "failure_probability": 0.3, "residual_fraction": 0.2},
            {"name": "no-op", "kind": "press-harvest", "species": "hare", "rate": 0.0, "start": 0.0, "end": 20.0},
        ],
        "options": [{"name": "cull", "interventions": ["fox cull"]},
                    {"name": "remove", "interventions": ["fox removal"]},
                    {"name": "nothing", "interventions": ["no-op"]}],
        "risk": {"horizons": [10.0, 20.0], "min_members": 10},
    })


def mesopredator_case(members: int = 200) -> dict:
    """Apex predator eating a mesopredator and a bird; the mesopredator eats the bird (Lotka–Volterra links).

    At the nominal parameters the web rests at bird ≈ 75, meso ≈ 12, apex ≈ 3; without the apex
    it settles at bird = 50, meso = 25, and without both at bird = K = 100 (equilibria of the
    three equations, solved by hand from dB = dM = 0).
    """
    return copy.deepcopy({
        "case": {"title": "mesopredator release", "time_unit": "year", "horizon": 40.0, "output_step": 1.0,
                 "spinup": 150.0, "members": members, "seed": 5},
        "parameters": {"meso_attack": {"distribution": "uniform", "low": 0.018, "high": 0.022, "unit": "1/(meso·year)",
                                       "source": "test"}},
        "species": [
            {"name": "bird", "growth": "logistic", "growth_rate": 1.0, "carrying_capacity": 100.0, "initial": 60.0,
             "quasi_extinction": 5.0, "role": "protected"},
            {"name": "meso", "growth": "none", "mortality": 0.3, "initial": 5.0, "quasi_extinction": 0.5},
            {"name": "apex", "growth": "none", "mortality": 0.2, "initial": 2.0, "quasi_extinction": 0.1,
             "role": "target"},
        ],
        "interactions": [
            {"type": "predation", "predator": "meso", "prey": "bird", "response": "holling1",
             "attack_rate": "meso_attack", "efficiency": 0.3},
            {"type": "predation", "predator": "apex", "prey": "bird", "response": "holling1", "attack_rate": 0.002,
             "efficiency": 0.1},
            {"type": "predation", "predator": "apex", "prey": "meso", "response": "holling1", "attack_rate": 0.05,
             "efficiency": 0.3},
        ],
        "interventions": [
            {"name": "apex removal", "kind": "eradication", "species": "apex", "time": 1.0},
            {"name": "meso removal", "kind": "eradication", "species": "meso", "time": 1.0},
        ],
        "options": [{"name": "apex only", "interventions": ["apex removal"]},
                    {"name": "apex and meso", "interventions": ["apex removal", "meso removal"]}],
        "objectives": [{"name": "bird spared", "species": "bird", "measure": "abundance", "horizon": 40.0,
                        "above": 60.0, "chance_at_least": 0.8}],
        "risk": {"horizons": [20.0, 40.0], "min_members": 100},
    })


def field_resolves(node, rest: str) -> bool:
    """Whether the dotted field path ``rest`` names something in ``node``: list entries are named
    ``[i]``, by their ``name``, or (limits on change) by their ``species``; the last component may be
    a key missing from an existing table (a required key that is absent)."""
    if rest == "":
        return True
    if isinstance(node, dict):
        for k in node:
            if isinstance(k, str) and (rest == k or any(rest.startswith(k + sep) and
                                                        field_resolves(node[k], rest[len(k) + (sep == "."):])
                                                        for sep in (".", "["))):
                return True
        return "." not in rest and "[" not in rest
    if isinstance(node, list):
        if rest.startswith("["):
            i, _, after = rest[1:].partition("]")
            return i.isdigit() and int(i) < len(node) and field_resolves(node[int(i)], after.removeprefix("."))
        for item in node:
            for by in ("name", "species"):
                name = item.get(by) if isinstance(item, dict) else None
                if isinstance(name, str) and (rest == name or (rest.startswith(name + ".")
                                                              and field_resolves(item, rest[len(name) + 1:]))):
                    return True
    return False
