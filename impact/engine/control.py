"""Butcher tableau, step-control constants and failure reasons shared by every stepper.

Both the numpy reference stepper (:mod:`impact.engine.integrate`) and the compiled kernel
(:mod:`impact.engine.kernel`) read their coefficients from here, so a change to step control is
made once.
"""

from __future__ import annotations

from enum import IntEnum

import numpy as np

# Step-size controller (Hairer, Norsett & Wanner 1993, Sec. II.4, eq. 4.13 with a safety factor;
# the values are those of scipy's RungeKutta solvers).
SAFETY = 0.9  # multiplies steps computed from the asymptotic behaviour of errors
MIN_FACTOR = 0.2  # smallest allowed decrease of a step size
MAX_FACTOR = 10.0  # largest allowed increase of a step size
MIN_STEP_ULPS = 10  # a step must move t by at least this many units in the last place
EPS = float(np.finfo(float).eps)
MIN_RTOL = 100 * EPS  # smaller relative tolerances are raised to this


class Failure(IntEnum):
    """Why a member stopped integrating (stored as int8 in results)."""

    OK = 0
    NONFINITE = 1  # a state, derivative or tangent became NaN or infinite
    BLOWUP = 2  # |y| exceeded the blow-up bound
    UNDERFLOW = 3  # the controller asked for a step below MIN_STEP_ULPS ulps
    TOO_MANY_STEPS = 4  # max_steps accepted steps without reaching the end

    @property
    def label(self) -> str:
        return _LABELS[self]


_LABELS = {Failure.OK: "ok", Failure.NONFINITE: "non-finite", Failure.BLOWUP: "blow-up",
           Failure.UNDERFLOW: "step underflow", Failure.TOO_MANY_STEPS: "too many steps"}

FAILURE_REASONS = {int(f): f.label for f in Failure}


class DormandPrince54:
    """Dormand-Prince 5(4) pair with first-same-as-last stages (Dormand & Prince 1980, Table 2).

    ``E`` is the difference between the 5th- and embedded 4th-order weights; its last entry
    multiplies the derivative at the new point (the FSAL stage).
    """

    order = 5
    error_estimator_order = 4
    n_stages = 6
    C = np.array([0, 1 / 5, 3 / 10, 4 / 5, 8 / 9, 1])
    A = np.array([
        [0, 0, 0, 0, 0],
        [1 / 5, 0, 0, 0, 0],
        [3 / 40, 9 / 40, 0, 0, 0],
        [44 / 45, -56 / 15, 32 / 9, 0, 0],
        [19372 / 6561, -25360 / 2187, 64448 / 6561, -212 / 729, 0],
        [9017 / 3168, -355 / 33, 46732 / 5247, 49 / 176, -5103 / 18656],
    ])
    B = np.array([35 / 384, 0, 500 / 1113, 125 / 192, -2187 / 6784, 11 / 84])
    E = np.array([-71 / 57600, 0, 71 / 16695, -71 / 1920, 17253 / 339200, -22 / 525, 1 / 40])


# The controller's exponent -1/(q+1) for the embedded order q.
ERROR_EXPONENT = -1.0 / (DormandPrince54.error_estimator_order + 1)


def template(jit: str):
    """Mark a function as source for the generated modules, compiled there with the decorator named
    ``jit`` (``"kernel_jit"`` or ``"kernel_inline"``) around the module's own right-hand side.

    The function is returned unchanged (plain Python: here it has no right-hand side to call);
    :func:`impact.engine.generate.template_source` prints it with its decorator.
    """
    def mark(fn):
        fn.jit = jit
        return fn
    return mark
