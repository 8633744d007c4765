"""impact: paired-ensemble risk assessment of interventions in food webs."""

__version__ = "0.2.0"
