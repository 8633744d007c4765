"""Importing the report's typesetting and plotting libraries ahead of time.

WeasyPrint and matplotlib take a few seconds to import. A run that will write a report starts
importing them in a background thread as soon as it starts: the compiled stages release Python's
lock while they integrate, so the imports use the time a core would otherwise wait, and the
report stage finds them loaded. Nothing is computed here; an import that fails is left for the
report stage to raise where it can say what is missing.
"""

from __future__ import annotations

import importlib
import threading

# the report's heavy imports (the rest of the report package is quick to load)
LIBRARIES = ("weasyprint", "matplotlib.figure", "matplotlib.backends.backend_agg", "networkx")


def _import_all():
    for name in LIBRARIES:
        try:
            importlib.import_module(name)
        except Exception:  # noqa: BLE001 - the report stage reports a missing library itself
            return


def preload() -> threading.Thread:
    """Start importing :data:`LIBRARIES` in a daemon thread; returns the thread."""
    worker = threading.Thread(target=_import_all, name="impact-preload", daemon=True)
    worker.start()
    return worker
