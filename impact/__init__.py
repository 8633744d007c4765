"""impact: paired-ensemble risk assessment of interventions in food webs.

The verbs of the Python interface live in :mod:`impact.api` and are reachable from here::

    import impact
    result = impact.assess("casework/island_mesopredator.toml", members=200)
    impact.save(result, "results/demo")

They are imported on first use, so ``import impact`` stays cheap for the command line.
"""

from impact.version import __version__

__all__ = ["AssessSettings", "Assessment", "ImpactError", "__version__", "assess", "calibrate", "load", "load_case",
           "report", "save"]

_API = {"AssessSettings", "Assessment", "assess", "calibrate", "load", "load_case", "report", "save"}


def __getattr__(name: str):
    if name in _API:
        from impact import api

        return getattr(api, name)
    if name == "ImpactError":
        from impact.errors import ImpactError

        return ImpactError
    raise AttributeError(f"module 'impact' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(__all__))
