"""Importing the later stages' heavy libraries ahead of time.

WeasyPrint and matplotlib (the report), SALib and scipy.stats (the sensitivity and regime stages)
take seconds to import, and a stage that imports them on its first line keeps both cores waiting
while it does. A run starts importing the libraries its stages will need in a background thread
as soon as it starts: the compiled stages release Python's lock while they integrate, so the
imports use time a core would otherwise wait, and the later stages find them loaded. Nothing is
computed here; an import that fails is left for its stage to raise where it can say what is
missing.
"""

from __future__ import annotations

import importlib
import threading

# each stage's heavy imports (the rest of its modules load quickly)
REPORT_LIBRARIES = ("weasyprint", "matplotlib.figure", "matplotlib.backends.backend_agg", "networkx")
SENSITIVITY_LIBRARIES = ("scipy.stats", "SALib.sample.sobol", "SALib.sample.morris")
DYNAMICS_LIBRARIES = ("scipy.stats",)


def _import_all(names):
    for name in names:
        try:
            importlib.import_module(name)
        except Exception:  # noqa: BLE001 - the stage reports a missing library itself
            continue


def preload(names) -> threading.Thread:
    """Start importing ``names`` (in order, each once) in a daemon thread; returns the thread."""
    worker = threading.Thread(target=_import_all, args=(tuple(dict.fromkeys(names)),), name="impact-preload",
                              daemon=True)
    worker.start()
    return worker
