import os
import sys
from pathlib import Path

# a run of 500 members or more starts a helper compiling the block engine for later runs; the suite's
# runs are many and short, so none does here (tests/engine/test_lanes.py starts its own on purpose)
os.environ.setdefault("IMPACT_LANES_ASIDE", "0")

sys.path.insert(0, str(Path(__file__).parent))
# the tests mirror the stage packages (tests/<stage>/); a test may reuse another stage's case builders
# (test_dynamics.rm_case, test_monitoring.growth_case, test_engine.random_web), so every stage folder is
# importable; test file names are unique across the folders
for _stage in sorted(Path(__file__).parent.iterdir()):
    if _stage.is_dir() and _stage.name.isidentifier() and any(_stage.glob("test_*.py")):
        sys.path.insert(0, str(_stage))
