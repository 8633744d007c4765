"""The layout rules of the contributor guide, checked on the code itself."""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parent.parent / "impact"


def _imports(path: Path):
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.level >= 1:
            yield node


def test_no_module_imports_a_private_name_of_another():
    bad = [f"{p.relative_to(PACKAGE.parent)}: {n.module}.{a.name}"
           for p in sorted(PACKAGE.rglob("*.py")) for n in _imports(p) for a in n.names
           if a.name.startswith("_") and a.name != "__version__"]
    assert not bad, bad


# Stages flow one way (DEVELOPERS.md): a module may import only from its own stage or earlier ones.
STAGES = [
    {"errors", "formatting", "likelihood", "priors", "metrics", "iucn", "voi", "dictionary", "interrupts", "streams", "preload", "__init__"},
    {"case", "units", "casetypes", "casereader", "casetables", "casestructures", "seriesfile", "casestudies"},
    {"model", "terms", "expr", "sample", "jacobian", "integrate", "engine", "control", "generate", "kernel", "web", "tangent", "flow", "precompile", "boundary",
     "stepper", "simulate", "execute"},
    {"assess", "observe", "calibrate"},
    {"effects", "results", "manifest", "outfolder", "budget", "bystructure", "dossier"},
    {"decision", "structurevoi", "structureregimes", "loops", "press", "sensitivity", "designs", "estimators", "outputs", "study", "studies", "weighing", "dynamics", "timescales", "regimes", "diagnose", "scan", "screen"},
    {"chart", "cautions", "bottomline", "verdict", "structures_verdict", "webfigure", "calibfigure", "report", "tables", "figures", "sections", "render"},
    {"api", "pipeline"},
    {"cli"},
]


def _stage(name: str) -> int:
    return next(i for i, s in enumerate(STAGES) if name in s)


def test_stages_flow_one_way():
    bad = []
    for p in sorted(PACKAGE.rglob("*.py")):
        # a sub-package's __init__ belongs to the package's stage
        here = _stage(p.parent.name if p.stem == "__init__" and p.parent != PACKAGE else p.stem)
        for n in _imports(p):
            target = (n.module or "").split(".")[-1] or "__init__"
            if _stage(target) > here:
                bad.append(f"{p.relative_to(PACKAGE.parent)} (stage {here}) imports {n.module} (stage {_stage(target)})")
    assert not bad, bad
