"""Analytic Jacobian of the food-web right-hand side :func:`impact.model.rhs`.

Built term by term from the declared interactions (the equations are in the docstring of
:mod:`impact.model`), so tangent (variational) equations can ride along with the model.
Every product is elementwise per member; nothing is summed across the member axis.
"""

from __future__ import annotations

import numpy as np

from .model import (RESPONSE_POWER, Controls, FoodWeb, WebParams, fertile_share, intakes, pollinated_share,
                    resource_density, season_wave)


def _intake_gradients(web: FoodWeb, p: WebParams, y: np.ndarray, idx) -> list[np.ndarray]:
    """dI_l/dy for every feeding link: list of ndarray (m, n)."""
    m, n = y.shape
    S = web.n_species
    denom = [np.ones(m) for _ in range(S)]
    dden = [np.zeros((m, n)) for _ in range(S)]
    powered, dpow = [], []
    for l, link in enumerate(web.links):
        R = resource_density(link, l, y, p.food[idx])
        q = RESPONSE_POWER[link.response]
        powered.append(R * R if q == 2 else R)
        # a constant alternative food has no state column: its density does not vary
        dpow.append((2.0 * R if q == 2 else np.ones(m)) if link.resource >= 0 else np.zeros(m))
        if link.response != "holling1":
            ah = p.a[idx, l] * p.h[idx, l]
            denom[link.consumer] = denom[link.consumer] + ah * powered[l]
            if link.resource >= 0:
                dden[link.consumer][:, link.resource] += ah * dpow[l]
    for j in web.interference:
        denom[j] = denom[j] + p.gamma[idx, j] * y[:, j]
        dden[j][:, j] += p.gamma[idx, j]
    out = []
    for l, link in enumerate(web.links):
        a = p.a[idx, l]
        g = np.zeros((m, n))
        if link.response == "holling1":
            if link.resource >= 0:
                g[:, link.resource] = a
        else:
            D = denom[link.consumer]
            g -= (a * powered[l] / (D * D))[:, None] * dden[link.consumer]
            if link.resource >= 0:
                g[:, link.resource] += a * dpow[l] / D
        out.append(g)
    return out


def jacobian(web: FoodWeb, p: WebParams, c: Controls, y: np.ndarray, idx, t=None) -> np.ndarray:
    """Jacobian ∂rhs/∂y of :func:`impact.model.rhs` for members ``idx``.

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
    m, n = y.shape
    S = web.n_species
    N = y[:, :S]
    r, mort = p.r[idx], p.m[idx]
    rp = np.maximum(r, 0.0)
    G = c.phi[idx] * (1.0 - c.fertility[idx])
    if web.wave:
        G[:, list(web.wave)] *= season_wave({"amp": p.amp[idx] * c.wave[idx], "omega": p.omega[idx], "phase": p.phase[idx]},
                                            web.wave, t)
    J = np.zeros((m, n, n))
    births, Jb = _births_and_gradient(web, p, y, idx)

    # births B scaled by G and by the fertile share σ = N/(N + s) under sterile releases
    sigma = np.ones_like(N)
    for i in web.sterile:
        sigma[:, i] = fertile_share(N[:, i], c.sterile[idx, i])
    Jbirth = (G * sigma)[:, :, None] * Jb
    for i in web.sterile:
        s = c.sterile[idx, i]
        with np.errstate(divide="ignore", invalid="ignore"):
            dsigma = np.where(s > 0, s / ((N[:, i] + s) ** 2), 0.0)
        Jbirth[:, i, i] += G[:, i] * births[:, i] * dsigma
    # life stages: the adult's births are born as juveniles, which mature at a rate
    for j, a in web.stages:
        Jbirth[:, j, :] += Jbirth[:, a, :]
        Jbirth[:, a, :] = 0.0
        J[:, j, j] -= p.mat[idx, j]
        J[:, a, j] += p.mat[idx, j]
    J[:, :S, :] += Jbirth

    # feeding: the resource loses I·N_c (the consumer's gain is in the births)
    if web.links:
        I = intakes(web, p, y, idx)
        dI = _intake_gradients(web, p, y, idx)
        for l, link in enumerate(web.links):
            j = link.consumer
            if link.resource < 0:
                continue  # an alternative food is not depleted
            d_eaten = dI[l] * N[:, j][:, None]
            d_eaten[:, j] += I[l]
            J[:, link.resource, :] -= d_eaten

    # logistic crowding r N (N + Σ α N_j) / (κ K)
    if web.logistic.any():
        crowd = N.copy()
        for k, (i, jj) in enumerate(web.competition):
            crowd[:, i] += p.alpha[idx, k] * N[:, jj]
        with np.errstate(divide="ignore", invalid="ignore"):
            coef = np.where(web.logistic, r / (c.habitat[idx] * p.K[idx]), 0.0)
        for i in np.flatnonzero(web.logistic):
            J[:, i, i] -= coef[:, i] * (crowd[:, i] + N[:, i])
        for k, (i, jj) in enumerate(web.competition):
            J[:, i, jj] -= coef[:, i] * N[:, i] * p.alpha[idx, k]
    if web.crowding:
        for i in range(S):
            J[:, i, i] -= 2.0 * p.quad[idx, i] * N[:, i]

    q = c.harvest[idx]
    lin = np.minimum(r, 0.0) - mort - q
    for i in range(S):
        J[:, i, i] += lin[:, i]

    if web.has_carrion:
        J[:, S, :S] += (mort + c.carcass[idx] * q) * web.carrion_yield
        J[:, S, S] -= p.decay[idx]
    return J


def _pollinated_gradient(web: FoodWeb, obH: np.ndarray, N: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """The obligate share 1 − Π_o H_o/(H_o + P_o) of births, (m, S), and its gradient (m, S, n):
    ∂/∂P_o = H_o/(H_o + P_o)² Π_{k≠o} H_k/(H_k + P_k)."""
    m, S = N.shape
    miss = {}
    for u, (ben, par) in enumerate(web.obligate):
        miss.setdefault(ben, []).append((u, par, obH[:, u] / (obH[:, u] + N[:, par])))
    ob = pollinated_share(web, obH, N)
    dob = np.zeros((m, S, n))
    for ben, parts in miss.items():
        for u, par, q in parts:
            others = np.prod([qq for uu, _, qq in parts if uu != u], axis=0) if len(parts) > 1 else 1.0
            H = obH[:, u]
            dob[:, ben, par] += others * H / ((H + N[:, par]) ** 2)
    return ob, dob


def _births_and_gradient(web: FoodWeb, p: WebParams, y: np.ndarray, idx) -> tuple[np.ndarray, np.ndarray]:
    """Births before controls, B_i = r⁺ N_i (1 + Σ β P/(H+P)) P_o/(H_o+P_o) + Σ e I N_i, and ∂B/∂y.

    Returns
    -------
    B : ndarray (m, S)
    dB : ndarray (m, S, n_state)
    """
    m, n = y.shape
    S = web.n_species
    N = y[:, :S]
    rp = np.maximum(p.r[idx], 0.0)
    boost = np.ones_like(N)
    dboost = np.zeros((m, S, n))
    for u, (ben, par) in enumerate(web.mutualism):
        P, H = N[:, par], p.H[idx, u]
        boost[:, ben] += p.beta[idx, u] * P / (H + P)
        dboost[:, ben, par] += p.beta[idx, u] * H / ((H + P) ** 2)
    ob, dob = _pollinated_gradient(web, p.obH[idx], N, n)
    B = rp * N * boost * ob
    dB = (rp * N)[:, :, None] * (dboost * ob[:, :, None] + boost[:, :, None] * dob)
    for i in range(S):
        dB[:, i, i] += rp[:, i] * boost[:, i] * ob[:, i]
    if web.links:
        I = intakes(web, p, y, idx)
        dI = _intake_gradients(web, p, y, idx)
        for l, link in enumerate(web.links):
            j = link.consumer
            e = p.e[idx, l]
            B[:, j] += e * I[l] * N[:, j]
            d_eaten = dI[l] * N[:, j][:, None]
            d_eaten[:, j] += I[l]
            dB[:, j, :] += e[:, None] * d_eaten
    return B, dB


def _along(D: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Per-member D·v for D (m, S, S), v (m, S), summed column by column (no BLAS across members)."""
    out = D[:, :, 0] * v[:, 0:1]
    for j in range(1, v.shape[1]):
        out = out + D[:, :, j] * v[:, j:j + 1]
    return out


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
    differentiating each interaction term along ``v`` costs about as much as the term itself,
    whereas building the (m, n, n) Jacobian costs n times that. Intermediate quantities
    (intakes, handling denominators, crowding) are shared with the right-hand side.
    Coefficients are gathered once per active set, as in :class:`impact.model.WebRHS`.
    """

    def __init__(self, web: FoodWeb, p: WebParams, c: Controls, engine: str = "compiled"):
        from .model import WebRHS

        self.web = web
        self._rhs = WebRHS(web, p, c)
        from .engine.tangent import supports

        self.engine = engine if supports(web) else "numpy"
        if self.engine == "compiled":
            # the compiled kernel (impact.engine.tangent): same arithmetic, member by member
            from .engine.web import pack_coefficients, pack_structure
            from .model import segment_coefficients

            co = segment_coefficients(web, p, c)
            self._st = pack_structure(web)
            self._coef = pack_coefficients(co, np.arange(co.scale.shape[0]))
            self._key, self._rows = None, None

    @property
    def structure(self) -> np.ndarray | None:
        """The web's structure table for the compiled kernels (None when the numpy reference evaluates)."""
        return self._st if self.engine == "compiled" else None

    def coefficient_rows(self, idx) -> np.ndarray:
        """Coefficient rows of members ``idx`` in the compiled kernels' layout: (m, P)."""
        return np.ascontiguousarray(self._coef[np.asarray(idx)])

    def __call__(self, t, y, v, idx):
        """``(f, Jv)`` for members ``idx`` (see :meth:`evaluate`)."""
        if self.engine != "compiled":
            return self.evaluate(t, y, v, idx)
        from .engine.boundary import check_kernel_arrays
        from .engine.tangent import batch_jvp

        if self._key is not idx:
            self._rows, self._key = np.ascontiguousarray(self._coef[idx]), idx
        y, v = np.ascontiguousarray(y, dtype=float), np.ascontiguousarray(v, dtype=float)
        out, jv = np.empty_like(y), np.empty_like(y)
        check_kernel_arrays("batch_jvp", self._st, coef=self._rows, y=y, v=v, out=out, jv=jv)  # boundary into compiled code
        batch_jvp(self._st, self._rows, y, v, out, jv)
        return out, jv

    def evaluate(self, t, y, v, idx):
        """``(f, Jv)`` for members ``idx``.

        Parameters
        ----------
        t : ndarray (m,) or None
            Per-member times (only a sinusoidal breeding season depends on them).
        y, v : ndarray (m, n_state)
            States and tangent vectors.
        idx : int ndarray (m,)

        Returns
        -------
        f, jv : ndarray (m, n_state)
        """
        web = self.web
        g = self._rhs._gather(idx)
        S = web.n_species
        N, dN_ = y[:, :S], v[:, :S]
        rpos = g["rpos"]
        if web.mutualism:
            boost = np.ones_like(N)
            dboost = np.zeros_like(N)
            beta, Hs = g["beta"], g["H"]
            for u, (ben, par) in enumerate(web.mutualism):
                P = N[:, par]
                Hu = Hs[:, u]
                boost[:, ben] += beta[:, u] * P / (Hu + P)
                dboost[:, ben] += beta[:, u] * Hu / ((Hu + P) * (Hu + P)) * dN_[:, par]
            births = rpos * N * boost
            dbirths = rpos * (dN_ * boost + N * dboost)
        else:
            births = rpos * N
            dbirths = rpos * dN_
        if web.obligate:
            share, dshare = _pollinated_gradient(web, g["obH"], N, y.shape[1])
            dshare_v = _along(dshare[:, :, :S], dN_)
            dbirths = dbirths * share + births * dshare_v
            births = births * share
        out = np.empty_like(y)
        jv = np.empty_like(y)
        if web.links:
            loss = np.zeros_like(y)
            dloss = np.zeros_like(y)
            a, ah, e = g["a"], g["ah"], g["e"]
            # handling denominators D_j = 1 + Σ a h R^q and their derivatives along v
            denom: dict[int, np.ndarray] = {}
            dden: dict[int, np.ndarray] = {}
            powered, dpowered = [], []
            food = g["food"]
            for l, link in enumerate(web.links):
                R = resource_density(link, l, y, food)
                dR = v[:, link.resource] if link.resource >= 0 else np.zeros_like(R)
                if RESPONSE_POWER[link.response] == 2:
                    Rq, dRq = R * R, 2.0 * R * dR
                else:
                    Rq, dRq = R, dR
                powered.append(Rq)
                dpowered.append(dRq)
                if link.response != "holling1":
                    term, dterm = ah[:, l] * Rq, ah[:, l] * dRq
                    j = link.consumer
                    denom[j] = term + denom[j] if j in denom else term + 1.0
                    dden[j] = dterm + dden[j] if j in dden else dterm
            gam = g["gamma"]
            for j in web.interference:
                denom[j] = denom[j] + gam[:, j] * N[:, j]
                dden[j] = dden[j] + gam[:, j] * dN_[:, j]
            for l, link in enumerate(web.links):
                j = link.consumer
                if link.response == "holling1":
                    I = a[:, l] * powered[l]
                    dI = a[:, l] * dpowered[l]
                else:
                    D = denom[j]
                    I = a[:, l] * powered[l] / D
                    dI = (a[:, l] * dpowered[l] - I * dden[j]) / D
                eaten = I * N[:, j]
                deaten = dI * N[:, j] + I * dN_[:, j]
                births[:, j] += e[:, l] * eaten
                dbirths[:, j] += e[:, l] * deaten
                if link.resource >= 0:
                    loss[:, link.resource] += eaten
                    dloss[:, link.resource] += deaten
        f = g["scale"] * births
        df = g["scale"] * dbirths
        if web.wave:
            w = season_wave(g, web.wave, t)
            f[:, list(web.wave)] *= w
            df[:, list(web.wave)] *= w
        if web.sterile:
            ster = g["sterile"]
            for i in web.sterile:
                s = ster[:, i]
                share = fertile_share(N[:, i], s)
                with np.errstate(divide="ignore", invalid="ignore"):
                    dshare = np.where(s > 0, s / ((N[:, i] + s) * (N[:, i] + s)), 0.0)
                df[:, i] = df[:, i] * share + f[:, i] * dshare * dN_[:, i]
                f[:, i] = f[:, i] * share
        if web.stages:
            mat = g["mat"]
            for j, a in web.stages:
                f[:, j] += f[:, a]
                df[:, j] += df[:, a]
                f[:, a] = 0.0
                df[:, a] = 0.0
                f[:, j] -= mat[:, j] * N[:, j]
                df[:, j] -= mat[:, j] * dN_[:, j]
                f[:, a] += mat[:, j] * N[:, j]
                df[:, a] += mat[:, j] * dN_[:, j]
        if web.logistic.any():
            crowd = N.copy()
            dcrowd = dN_.copy()
            alpha = g["alpha"]
            for k, (i, j) in enumerate(web.competition):
                crowd[:, i] += alpha[:, k] * N[:, j]
                dcrowd[:, i] += alpha[:, k] * dN_[:, j]
            dens = g["dens"]
            f -= dens * N * crowd
            df -= dens * (dN_ * crowd + N * dcrowd)
        if web.crowding:
            f -= g["quad"] * N * N
            df -= 2.0 * g["quad"] * N * dN_
        f += g["lin"] * N
        df += g["lin"] * dN_
        if web.links:
            f -= loss[:, :S]
            df -= dloss[:, :S]
        out[:, :S] = f
        jv[:, :S] = df
        if web.has_carrion:
            inflow, decay = g["inflow"], g["decay"]
            # summed species by species, as in WebRHS, so the order never depends on the batch
            gain, dgain = inflow[:, 0] * N[:, 0], inflow[:, 0] * dN_[:, 0]
            for i in range(1, S):
                gain = gain + inflow[:, i] * N[:, i]
                dgain = dgain + inflow[:, i] * dN_[:, i]
            dC = gain - decay * y[:, S]
            ddC = dgain - decay * v[:, S]
            if web.links:
                dC -= loss[:, S]
                ddC -= dloss[:, S]
            out[:, S] = dC
            jv[:, S] = ddC
        return out, jv
