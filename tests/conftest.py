import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
# the tests mirror the stage packages (tests/<stage>/); a test may reuse another stage's case builders
# (test_dynamics.rm_case, test_monitoring.growth_case, test_engine.random_web), so every stage folder is
# importable; test file names are unique across the folders
for _stage in sorted(Path(__file__).parent.iterdir()):
    if _stage.is_dir() and _stage.name.isidentifier() and any(_stage.glob("test_*.py")):
        sys.path.insert(0, str(_stage))
