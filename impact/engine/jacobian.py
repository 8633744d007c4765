"""Analytic Jacobian and J·v of the food-web right-hand side :func:`impact.model.rhs`.

Both come from the terms declared once in :mod:`impact.model.terms`, differentiated statement by
statement (forward mode), so tangent (variational) equations ride along with the model. Every
product is elementwise per member; nothing is summed across the member axis.
"""

from __future__ import annotations

import numpy as np

from impact.model import Controls, FoodWeb, WebParams, WebRHS, pack_coefficients, segment_coefficients
from impact.model.terms import numpy_jvp, pack_structure


def jacobian(web: FoodWeb, p: WebParams, c: Controls, y: np.ndarray, idx, t=None) -> np.ndarray:
    """Jacobian ∂rhs/∂y of :func:`impact.model.rhs` for members ``idx``: column j is J·e_j, the
    directional derivative of the declared terms (:func:`impact.model.terms.tangent_program`).

    Parameters
    ----------
    y : ndarray (m, n_state)
    idx : int ndarray (m,)
    t : ndarray (m,), optional
        Times, for a sinusoidal breeding season (None: its season mean).

    Returns
    -------
    J : ndarray (m, n_state, n_state)
        ``J[k, i, j] = ∂(dy_i/dt)/∂y_j`` for member ``idx[k]``.
    """
    y = np.asarray(y, float)
    m, n = y.shape
    fn = numpy_jvp(pack_structure(web))
    cols = np.ascontiguousarray(pack_coefficients(segment_coefficients(web, p, c))[idx].T)
    J = np.empty((m, n, n))
    f, unit, jv = np.empty_like(y), np.zeros_like(y), np.empty_like(y)
    for j in range(n):
        unit[:, j] = 1.0
        fn(t, y, unit, cols, f, jv)
        J[:, :, j] = jv
        unit[:, j] = 0.0
    return J


def tangent(J: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Per-member product ``J v`` without BLAS across members: (m, n, n), (m, n) -> (m, n)."""
    n = v.shape[1]
    out = J[:, :, 0] * v[:, 0:1]
    for j in range(1, n):
        out += J[:, :, j] * v[:, j:j + 1]
    return out


class WebTangent:
    """Right-hand side and its directional derivative J·v in one pass, without forming J.

    The tangent equations need only the product of the Jacobian with one vector per member;
    differentiating each term along ``v`` costs about as much as the term itself, whereas building
    the (m, n, n) Jacobian costs n times that. Both engines run the statements of
    :func:`impact.model.terms.tangent_program`: "numpy" on whole columns of members, "compiled" member by
    member in the kernel generated for the web's structure (:mod:`impact.engine.generate`); the two
    agree to the bit. Coefficient rows are gathered once per active set, as in
    :class:`impact.model.WebRHS`.
    """

    def __init__(self, web: FoodWeb, p: WebParams, c: Controls, engine: str = "compiled"):
        if engine not in ("compiled", "numpy"):
            raise ValueError(f"engine must be 'compiled' or 'numpy', got {engine!r}")
        self.web = web
        self.engine = engine
        self._rhs = WebRHS(web, p, c)
        self._st = self._rhs.structure
        self._coef = self._rhs.coefficients

    @property
    def structure(self) -> np.ndarray | None:
        """The web's structure table for the compiled kernels (None when the numpy reference evaluates)."""
        return self._st if self.engine == "compiled" else None

    def coefficient_rows(self, idx) -> np.ndarray:
        """Coefficient rows of members ``idx`` in the compiled kernels' layout: (m, P)."""
        return np.ascontiguousarray(self._coef[np.asarray(idx)])

    def __call__(self, t, y, v, idx):
        """``(f, Jv)`` for members ``idx`` (see :meth:`evaluate`)."""
        if self.engine != "compiled" or (t is None and self.web.wave):
            return self.evaluate(t, y, v, idx)  # the season mean leaves the breeding wave out
        from impact.engine.generate import specialised_flow

        rows = np.ascontiguousarray(self._coef[np.asarray(idx)])
        times = np.zeros(len(y)) if t is None else np.ascontiguousarray(np.broadcast_to(np.asarray(t, float), (len(y),)))
        y, v = np.ascontiguousarray(y, dtype=float), np.ascontiguousarray(v, dtype=float)
        out, jv = np.empty_like(y), np.empty_like(y)
        from impact.engine.boundary import check_kernel_arrays

        check_kernel_arrays("batch_jvp", self._st, coef=rows, y=y, v=v, out=out, jv=jv)  # boundary into compiled code
        specialised_flow(self._st).batch_jvp(self._st, rows, times, y, v, out, jv)
        return out, jv

    def evaluate(self, t, y, v, idx):
        """``(f, Jv)`` for members ``idx`` by the numpy reference.

        Parameters
        ----------
        t : ndarray (m,) or None
            Per-member times (only a sinusoidal breeding season depends on them; None: its season mean).
        y, v : ndarray (m, n_state)
            States and tangent vectors.
        idx : int ndarray (m,)

        Returns
        -------
        f, jv : ndarray (m, n_state)
        """
        out, jv = np.empty_like(y), np.empty_like(y)
        numpy_jvp(self._st)(t, y, v, self._rhs.columns(idx), out, jv)
        return out, jv
