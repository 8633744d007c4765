"""The prior-box screen (package: ``designs``, ``estimators``, ``outputs``, ``study``).

Which uncertain parameters drive each risk: Sobol global sensitivity (SALib), Morris screening.

Layers, from the bottom up:

* :class:`SobolDesign` / :func:`sobol_design` — a Saltelli design on the unit hypercube that
  carries its own layout (N, D, second-order flag); :class:`MorrisDesign` likewise.
* :func:`sobol_indices` — SALib's estimators (computed for every parameter and resample at once by
  :func:`saltelli_estimates`) on one design and a matrix of outputs, with the
  failure rule (blocks holding a failed point are dropped whole, and the output is refused
  when too many points failed).
* :func:`sobol_study` — the generic entry point: any model ``f(unit rows (n, D)) -> (n, K)``
  through design, estimation and the N/2 convergence check.  Tests feed analytic functions
  through exactly this path; :func:`food_web_model` makes the food web such a function.
* :func:`sensitivity_stage` — the assessment stage: tidy tables for the results directory.

Numerics only; no file I/O and no printing.
"""

from __future__ import annotations

from impact.decision.sensitivity.designs import MorrisDesign, SobolDesign, morris_design, sobol_design
from impact.decision.sensitivity.estimators import (Indices, Study, convergence, given_data_first_order,
    morris_effects, rbd_first_order, saltelli_estimates, sobol_indices, sobol_study, through_priors)
from impact.decision.sensitivity.outputs import (METRIC_TEXT, PLAUSIBLE, DesignTask, FoodWebModel, design_chunk,
    output_labels, point_metrics, point_streams)
from impact.decision.sensitivity.study import (CONV_COLUMNS, INDEX_COLUMNS, POLICY, RANK_COLUMNS, S2_COLUMNS,
    Settings, StageResult, check_settings, morris_screen, sensitivity_stage, summary_lines)

__all__ = ["CONV_COLUMNS", "INDEX_COLUMNS", "METRIC_TEXT", "PLAUSIBLE", "POLICY", "RANK_COLUMNS", "S2_COLUMNS", "DesignTask",
           "FoodWebModel", "Indices", "MorrisDesign", "Settings", "SobolDesign", "StageResult", "Study", "check_settings",
           "convergence", "design_chunk", "given_data_first_order", "morris_design", "morris_effects", "output_labels",
           "point_metrics", "point_streams", "rbd_first_order", "saltelli_estimates", "sensitivity_stage", "sobol_design", "sobol_indices", "sobol_study", "morris_screen",
           "summary_lines", "through_priors"]
