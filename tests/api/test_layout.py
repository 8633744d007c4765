"""The layout rules of the contributor guide, checked on the code itself.

Every module of ``impact`` belongs to a stage package; a module may import its own package and the
packages of earlier stages, never a later one, and never another module's private (``_name``) names.
Absolute (``from impact.risk import ...``) and relative (``from ..risk import ...``) imports are both read,
including the ones inside functions.
"""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[2] / "impact"

# The pipeline's order (DEVELOPERS.md). Packages on one line share a rank and may not import each other.
STAGES = [
    ("errors", "version"),
    ("run",),
    ("store",),
    ("case",),
    ("model",),
    ("engine",),
    ("ensemble",),
    ("risk",),
    ("decision", "dynamics"),
    ("dossier",),
    ("api",),
    ("pipeline",),
    ("cli", "__init__"),
]
RANK = {name: rank for rank, names in enumerate(STAGES) for name in names}


def module_name(path: Path, root: Path) -> str:
    parts = list(path.relative_to(root.parent).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def imported_modules(path: Path, root: Path):
    """(line, absolute module, names) of every import of the package in ``path``, relative ones resolved."""
    name = module_name(path, root)
    package = name if path.stem == "__init__" else name.rsplit(".", 1)[0]
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[:len(package.split(".")) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if target.split(".")[0] == root.name:
                yield node.lineno, target, [a.name for a in node.names]
        elif isinstance(node, ast.Import):
            for a in node.names:
                if a.name.split(".")[0] == root.name:
                    yield node.lineno, a.name, []


def stage_of(module: str, names=()) -> str:
    """The stage package of ``impact.<stage>...``; ``from impact import x`` is stage ``x``."""
    parts = module.split(".")
    if len(parts) == 1:
        return names[0] if len(names) == 1 else "__init__"
    return parts[1]


def layout_violations(root: Path) -> list[str]:
    """Every import in the package tree ``root`` that runs against the stage order."""
    bad = []
    for p in sorted(root.rglob("*.py")):
        here = stage_of(module_name(p, root)) if p != root / "__init__.py" else "__init__"
        if here not in RANK:
            bad.append(f"{p.relative_to(root.parent)}: stage package {here!r} is not in the stage order")
            continue
        for line, target, names in imported_modules(p, root):
            there = stage_of(target, names)
            if there not in RANK:
                bad.append(f"{p.relative_to(root.parent)}:{line} imports {target} (no stage {there!r})")
            elif here != there and RANK[there] >= RANK[here]:
                bad.append(f"{p.relative_to(root.parent)}:{line} ({here}) imports {target} ({there}), "
                           "a later or parallel stage")
    return bad


def private_imports(root: Path) -> list[str]:
    return [f"{p.relative_to(root.parent)}:{line}: {target}.{n}"
            for p in sorted(root.rglob("*.py")) for line, target, names in imported_modules(p, root)
            for n in names if n.startswith("_") and n != "__version__"]


def test_no_module_imports_a_private_name_of_another():
    bad = private_imports(PACKAGE)
    assert not bad, bad


def test_stages_flow_one_way():
    bad = layout_violations(PACKAGE)
    assert not bad, bad


def test_every_module_sits_in_a_stage_package():
    loose = [p.name for p in PACKAGE.glob("*.py")
             if p.stem not in ("__init__", "errors", "version", "api", "pipeline", "cli")]
    assert not loose, f"modules outside the stage packages: {loose}"


def _tree(tmp_path: Path, files: dict[str, str]) -> Path:
    root = tmp_path / "impact"
    for rel, text in files.items():
        f = root / rel
        f.parent.mkdir(parents=True, exist_ok=True)
        f.write_text(text, encoding="utf-8")
    return root


def test_the_check_finds_an_upward_import_planted_in_a_tree(tmp_path):
    root = _tree(tmp_path, {
        "__init__.py": "", "errors.py": "",
        "risk/__init__.py": "", "risk/metrics.py": "X = 1\n",
        "ensemble/__init__.py": "",
        # absolute, relative and function-local imports of a later stage
        "ensemble/draws.py": "from impact.risk.metrics import X\n",
        "ensemble/calibrate.py": "def f():\n    from ..risk import metrics\n",
        "ensemble/observe.py": "import impact.dossier.verdict\n",
        "case/__init__.py": "from impact.ensemble import draws\n",
        "risk/effects.py": "from impact.ensemble.draws import X\nfrom . import metrics\nfrom impact.errors import E\n",
    })
    bad = layout_violations(root)
    assert len(bad) == 4, bad
    assert all(("ensemble/" in b) or ("case/__init__" in b) for b in bad), bad


def test_the_check_finds_a_parallel_import_and_a_private_name(tmp_path):
    root = _tree(tmp_path, {
        "__init__.py": "", "decision/__init__.py": "", "dynamics/__init__.py": "",
        "decision/voi.py": "from impact.dynamics.regimes import _verdict\n",
    })
    assert len(layout_violations(root)) == 1
    assert private_imports(root) == ["impact/decision/voi.py:1: impact.dynamics.regimes._verdict"]
