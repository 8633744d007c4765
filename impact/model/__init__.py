"""Food-web model builder: from a validated case to a vectorised right-hand side.

State layout: one column per declared species (in case order), then one column for the
carrion pool when the case declares one.  For species i (abundance N_i)::

    dN_i/dt =  φ_i (1 − f_i) σ_i [ r⁺_i N_i (1 + Σ β_u P_u/(H_u + P_u)) · P_o/(H_o + P_o)
                                  + Σ_{l: i eats} e_l I_l N_i ]
             − [logistic]  r_i N_i (N_i + Σ_j α_ij N_j) / (κ_i K_i)
             − μ_i N_i² + r⁻_i N_i − m_i N_i − q_i N_i − Σ_{l: i eaten} I_l N_consumer(l)

    dC/dt   =  Σ_i y_i (m_i N_i + c_i q_i N_i) − δ C − Σ_{l: carrion eaten} I_l N_consumer(l)

with per-capita intake I_l of consumer j on resource R by Holling type I (a R),
II (a R / D_j) or III (a R² / D_j), or Beddington–DeAngelis (a R / D_j), where
D_j = 1 + Σ_{j's saturating links} a h R^q + γ_j N_j shares handling time across all of j's
resources (so omnivory uses the same machinery) and γ_j is j's interference with its own kind
(0 unless j feeds with a Beddington–DeAngelis response; Beddington 1975, DeAngelis et al. 1975).

φ is the environmental growth multiplier times the breeding-season multiplier (1 inside the
season's breeding parts, the declared ``outside`` level elsewhere), f the fertility
suppression, σ_i = N_i/(N_i + s_i) the share of fertile matings when s_i sterile individuals
(density × competitiveness) are present (Knipling 1955; σ = 1 without releases), κ the
carrying-capacity factor, q the harvest rate and c marks harvests that leave carcasses.
r⁺ = max(r, 0) are births, r⁻ = min(r, 0) an exponential decline that fertility control does
not touch; μ_i is crowding (density-dependent) mortality.

Mutualism: a facultative partner u multiplies births by at most 1 + β_u, so a logistic
beneficiary alone settles at K (1 + β P/(H + P)), not K. An obligate partner o makes births
P_o/(H_o + P_o) of their maximum and none without it (pollination-limited seed set; the
saturating consumer–resource form of Holland & DeAngelis 2010); with several obligate partners,
each pollinating independently, 1 − Π_o H_o/(H_o + P_o) (written P_o/(H_o + P_o) above for one).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from impact.case import CARRION, Case
from impact.model.terms import RESPONSE_POWER, numpy_rhs, pack_structure


@dataclass(frozen=True)
class Link:
    consumer: int
    resource: int  # state column (the carrion pool is column S); −1 for a constant alternative food
    response: str
    kind: str


@dataclass(frozen=True)
class FoodWeb:
    """Structure of the web: names, state layout and interaction index lists."""

    species: tuple[str, ...]
    has_carrion: bool
    logistic: np.ndarray  # (S,) bool
    links: tuple[Link, ...]
    competition: tuple[tuple[int, int], ...]  # (species, competitor)
    mutualism: tuple[tuple[int, int], ...]  # (beneficiary, partner)
    carrion_yield: np.ndarray  # (S,)
    unit: tuple[str, ...]
    obligate: tuple[tuple[int, int], ...] = ()  # (beneficiary, partner) of each obligate mutualism
    interference: tuple[int, ...] = ()  # consumers whose handling denominator has γ N
    crowding: bool = False  # some species has crowding mortality
    sterile: tuple[int, ...] = ()  # species that sterile releases may act on
    stages: tuple[tuple[int, int], ...] = ()  # (juvenile, adult): the adult's births are born as juveniles
    wave: tuple[int, ...] = ()  # species whose births follow a sinusoidal breeding season
    allee: tuple[tuple[int, str], ...] = ()  # (species, kind): an Allee effect (impact.model.terms.ALLEE_KINDS)

    @property
    def n_species(self) -> int:
        return len(self.species)

    @property
    def n_state(self) -> int:
        return self.n_species + int(self.has_carrion)

    @property
    def state_names(self) -> tuple[str, ...]:
        return self.species + ((CARRION,) if self.has_carrion else ())


@dataclass(frozen=True)
class WebParams:
    """Per-member parameter values, each an array with leading axis ``members``.

    Attributes
    ----------
    r, K, m : ndarray (M, S)
        Intrinsic growth rate, carrying capacity (inf where not logistic), mortality.
    a, h, e : ndarray (M, L)
        Attack rate, handling time and conversion efficiency per feeding link.
    alpha : ndarray (M, Cc)
        Competition coefficients; ``beta``, ``H`` : ndarray (M, U) mutualism benefit and
        half-saturation; ``decay`` : ndarray (M,) carrion decay rate.
    initial : ndarray (M, n_state)
    noise_sd : ndarray (M, S)
    quad : ndarray (M, S)
        Crowding mortality μ (zeros by default).
    obH : ndarray (M, O)
        Half-saturation of each obligate mutualism.
    gamma : ndarray (M, S)
        Interference of each consumer (zeros by default).
    food : ndarray (M, L)
        Density of a link's constant alternative food (zeros for links to a species or carrion).
    mat : ndarray (M, S)
        Maturation rate of each juvenile stage (zeros elsewhere).
    amp, omega, phase : ndarray (M, S)
        Amplitude A, angular frequency ω = 2π/season length and phase ω·t_peak of a sinusoidal
        breeding season (births × (1 + A cos(ω t − ω t_peak))); zeros elsewhere.
    allee : ndarray (M, S)
        Allee threshold of each species with an Allee effect (θ of mate finding, A of a strong
        Allee effect, h of predator dilution; zeros elsewhere).
    dilution : ndarray (M, S)
        Most removals per time unit D by the generalist predator of a predator-dilution Allee
        effect (zeros elsewhere).
    """

    r: np.ndarray
    K: np.ndarray
    m: np.ndarray
    a: np.ndarray
    h: np.ndarray
    e: np.ndarray
    alpha: np.ndarray
    beta: np.ndarray
    H: np.ndarray
    decay: np.ndarray
    initial: np.ndarray
    noise_sd: np.ndarray
    quad: np.ndarray | None = None
    obH: np.ndarray | None = None
    gamma: np.ndarray | None = None
    food: np.ndarray | None = None
    mat: np.ndarray | None = None
    amp: np.ndarray | None = None
    omega: np.ndarray | None = None
    phase: np.ndarray | None = None
    allee: np.ndarray | None = None
    dilution: np.ndarray | None = None

    def __post_init__(self):
        for name, fill in (("quad", 0.0), ("gamma", 0.0), ("mat", 0.0), ("amp", 0.0), ("omega", 0.0),
                           ("phase", 0.0), ("allee", 0.0), ("dilution", 0.0)):
            if getattr(self, name) is None:
                object.__setattr__(self, name, np.full(self.r.shape, fill))
        if self.obH is None:
            object.__setattr__(self, "obH", np.ones((self.r.shape[0], 0)))
        if self.food is None:
            object.__setattr__(self, "food", np.zeros(self.a.shape))


@dataclass(frozen=True)
class Controls:
    """Piecewise-constant controls during one segment, each ``(M, S)``."""

    phi: np.ndarray  # environmental growth multiplier (times the breeding-season multiplier)
    fertility: np.ndarray  # fraction of births suppressed
    habitat: np.ndarray  # carrying-capacity factor
    harvest: np.ndarray  # proportional removal rate
    carcass: np.ndarray  # 1 where harvested animals are left as carrion
    sterile: np.ndarray | None = None  # sterile individuals present (density × competitiveness)
    wave: np.ndarray | None = None  # 1: sinusoidal breeding seasons act; 0: the season-averaged web

    def __post_init__(self):
        for name, fill in (("sterile", 0.0), ("wave", 1.0)):
            if getattr(self, name) is None:
                object.__setattr__(self, name, np.full(self.phi.shape, fill))

    @staticmethod
    def neutral(members: int, n_species: int) -> "Controls":
        one, zero = np.ones((members, n_species)), np.zeros((members, n_species))
        return Controls(one, zero, one.copy(), zero.copy(), zero.copy(), zero.copy(), one.copy())


def build_web(case: Case) -> FoodWeb:
    """Index the case's species and interactions into a :class:`FoodWeb`."""
    names = case.species_names
    col = {n: i for i, n in enumerate(names)}
    col[CARRION] = len(names)
    links = tuple(Link(col[f.consumer], col.get(f.resource, -1), f.response, f.kind) for f in case.feeding)
    interference = sorted({col[f.consumer] for f in case.feeding if f.response == "beddington-deangelis"})
    sterile = sorted({col[iv.species] for iv in case.interventions if iv.kind == "sterile-release"})
    return FoodWeb(
        species=names,
        has_carrion=case.carrion is not None,
        logistic=np.array([s.growth == "logistic" for s in case.species]),
        links=links,
        competition=tuple((col[c.species], col[c.competitor]) for c in case.competition),
        mutualism=tuple((col[u.beneficiary], col[u.partner]) for u in case.mutualism if not u.obligate),
        carrion_yield=np.array([s.carrion_yield for s in case.species], float),
        unit=tuple(s.unit for s in case.species),
        obligate=tuple((col[u.beneficiary], col[u.partner]) for u in case.mutualism if u.obligate),
        interference=tuple(interference),
        crowding=any(s.crowding_mortality != 0.0 for s in case.species),
        sterile=tuple(sterile),
        stages=tuple((col[s.name], col[s.matures_into]) for s in case.species if s.matures_into is not None),
        wave=tuple(i for i, s in enumerate(case.species) if s.breeding_amplitude is not None),
        allee=tuple((i, s.allee) for i, s in enumerate(case.species) if s.allee != "none"),
    )


def resolve(q, values: dict[str, np.ndarray], members: int) -> np.ndarray:
    """Value of a case quantity for every member: ndarray (members,)."""
    if q is None:
        return np.zeros(members)
    if isinstance(q, str):
        return np.asarray(values[q], float)
    return np.full(members, float(q))


def web_params(case: Case, values: dict[str, np.ndarray], members: int) -> WebParams:
    """Assemble per-member arrays from parameter values.

    Parameters
    ----------
    values : dict of str -> ndarray (members,)
        Value of every declared parameter (fixed ones included) for each member.
    """

    def col(qs):
        if not qs:
            return np.zeros((members, 0))
        return np.stack([resolve(q, values, members) for q in qs], axis=1)

    sp = case.species
    K = col([s.carrying_capacity if s.growth == "logistic" else np.inf for s in sp])
    initial = col([s.initial for s in sp])
    if case.carrion is not None:
        initial = np.concatenate([initial, np.full((members, 1), case.carrion.initial)], axis=1)
        decay = resolve(case.carrion.decay_rate, values, members)
    else:
        decay = np.zeros(members)
    facultative = [u for u in case.mutualism if not u.obligate]
    omega = 2.0 * np.pi / case.seasons.length if case.seasons is not None else 0.0
    gamma = {f.consumer: f.interference for f in case.feeding if f.response == "beddington-deangelis"}
    return WebParams(
        r=col([s.growth_rate for s in sp]),
        K=K,
        m=col([s.mortality for s in sp]),
        a=col([f.attack_rate for f in case.feeding]),
        h=col([f.handling_time for f in case.feeding]),
        e=col([f.efficiency for f in case.feeding]),
        alpha=col([c.coefficient for c in case.competition]),
        beta=col([u.max_benefit for u in facultative]),
        H=col([u.half_saturation for u in facultative]),
        decay=decay,
        initial=initial,
        noise_sd=col([s.noise_sd for s in sp]),
        quad=col([s.crowding_mortality for s in sp]),
        obH=col([u.half_saturation for u in case.mutualism if u.obligate]),
        gamma=col([gamma.get(s.name, 0.0) for s in sp]),
        food=col([f.food_density or 0.0 for f in case.feeding]),
        mat=col([s.maturation_rate for s in sp]),
        amp=col([s.breeding_amplitude if s.breeding_amplitude is not None else 0.0 for s in sp]),
        omega=col([omega if s.breeding_amplitude is not None else 0.0 for s in sp]),
        phase=col([omega * case.seasons.peak_time(s.breeding_peak) if s.breeding_amplitude is not None else 0.0
                   for s in sp]),
        allee=col([s.allee_threshold if s.allee != "none" else 0.0 for s in sp]),
        dilution=col([s.dilution_rate if s.allee == "predator-dilution" else 0.0 for s in sp]),
    )


@dataclass(frozen=True)
class SegmentCoefficients:
    """Per-member coefficients of the right-hand side during one segment (controls folded in).

    Attributes
    ----------
    scale : ndarray (M, S)
        φ (1 − f): multiplies births.
    rpos : ndarray (M, S)
        max(r, 0), the birth rate.
    lin : ndarray (M, S)
        min(r, 0) − m − q, the linear loss rate.
    dens : ndarray (M, S)
        r / (κ K) for logistic species, else 0.
    inflow : ndarray (M, S)
        (m + c q) · carrion yield (zeros without a carrion pool).
    quad, gamma : ndarray (M, S)
        Crowding mortality, interference.
    food : ndarray (M, L)
        Alternative food density per link (0 for links to a state variable).
    sterile : ndarray (M, S)
        Sterile individuals present (density × competitiveness; 0 without releases).
    obH : ndarray (M, O)
        Half-saturation of each obligate mutualism.
    mat : ndarray (M, S)
        Maturation rate of juvenile stages.
    amp, omega, phase : ndarray (M, S)
        Sinusoidal breeding: births × (1 + amp·cos(omega·t − phase)).
    a, ah, e : ndarray (M, L)
        Attack rate, attack rate × handling time, efficiency per feeding link.
    alpha : ndarray (M, Cc); beta, H : ndarray (M, U); decay : ndarray (M,)
    allee : ndarray (M, S)
        Allee threshold (θ, A or h; 0 without an Allee effect), appended after decay.
    dilution : ndarray (M, S)
        Predator-dilution removal rate D (0 elsewhere), appended after allee.
    """

    scale: np.ndarray
    rpos: np.ndarray
    lin: np.ndarray
    dens: np.ndarray
    inflow: np.ndarray
    quad: np.ndarray
    gamma: np.ndarray
    sterile: np.ndarray
    mat: np.ndarray
    amp: np.ndarray
    omega: np.ndarray
    phase: np.ndarray
    a: np.ndarray
    ah: np.ndarray
    e: np.ndarray
    food: np.ndarray
    alpha: np.ndarray
    beta: np.ndarray
    H: np.ndarray
    obH: np.ndarray
    decay: np.ndarray
    allee: np.ndarray
    dilution: np.ndarray


# The coefficients a segment's controls change; the others depend on the parameters alone, so a
# run of many segments computes them once.
CONTROLLED = ("scale", "lin", "dens", "inflow", "sterile", "amp")


def controlled_coefficients(web: FoodWeb, p: WebParams, c: Controls) -> dict[str, np.ndarray]:
    """The :data:`CONTROLLED` coefficients of one segment, by name: each (M, S)."""
    S = web.n_species
    with np.errstate(divide="ignore", invalid="ignore"):
        dens = np.where(web.logistic, p.r / (c.habitat * p.K), 0.0)
    if web.has_carrion:
        inflow = (p.m + c.carcass * c.harvest) * web.carrion_yield
    else:
        inflow = np.zeros((len(p.r), S))
    return {"scale": c.phi * (1.0 - c.fertility), "lin": np.minimum(p.r, 0.0) - p.m - c.harvest, "dens": dens,
            "inflow": inflow, "sterile": c.sterile, "amp": p.amp * c.wave}


def segment_coefficients(web: FoodWeb, p: WebParams, c: Controls) -> SegmentCoefficients:
    """Fold parameters and one segment's controls into the right-hand side's coefficients."""
    return SegmentCoefficients(
        **controlled_coefficients(web, p, c), rpos=np.maximum(p.r, 0.0), quad=p.quad, gamma=p.gamma,
        mat=p.mat, omega=p.omega, phase=p.phase, a=p.a, ah=p.a * p.h, e=p.e, food=p.food,
        alpha=p.alpha, beta=p.beta, H=p.H, obH=p.obH, decay=p.decay, allee=p.allee,
        dilution=p.dilution)


def pack_coefficients(co: SegmentCoefficients, rows: np.ndarray | None = None, out: np.ndarray | None = None
                      ) -> np.ndarray:
    """Coefficient rows of members ``rows`` (default all), blocks in the order of
    :class:`SegmentCoefficients` (the layout of :mod:`impact.model.terms`): (m, P) float64.

    ``out`` (m, P), optional, receives them (a caller packing many segments fills one array).
    """
    fields = [getattr(co, f) for f in SegmentCoefficients.__dataclass_fields__]
    fields = [f[:, None] if f.ndim == 1 else f for f in fields]  # decay is one number per member
    if rows is not None:
        fields = [np.take(f, rows, axis=0) for f in fields]
    if out is None:
        return np.ascontiguousarray(np.concatenate(fields, axis=1), dtype=float)
    at = 0
    for f in fields:
        out[:, at:at + f.shape[1]] = f
        at += f.shape[1]
    if at != out.shape[1]:
        raise ValueError(f"out has {out.shape[1]} columns for {at} coefficients")
    return out


class WebRHS:
    """Right-hand side bound to one segment's parameters and controls: the numpy reference, the
    statements declared in :mod:`impact.model.terms` run on whole columns of members.

    Gathering each member's coefficient rows is a large part of the cost of an evaluation, so the
    gathered rows are kept while the integrator passes the same member-index array (it only makes a
    new one when its active set shrinks).  Results never depend on the cache.
    """

    def __init__(self, web: FoodWeb, p: WebParams, c: Controls):
        self.web, self.p, self.c = web, p, c
        self.structure = pack_structure(web)
        self.coefficients = pack_coefficients(segment_coefficients(web, p, c))
        self._fn = numpy_rhs(self.structure)
        self._key = None
        self._rows = None

    def columns(self, idx) -> np.ndarray:
        """Coefficient rows of members ``idx``, transposed: (P, m), contiguous."""
        if self._key is not idx:
            self._rows = np.ascontiguousarray(self.coefficients[idx].T)
            self._key = idx
        return self._rows

    def __call__(self, t, y, idx):
        """Time derivative for members ``idx``.

        Parameters
        ----------
        t : ndarray (m,) or None
            Per-member times: controls are constant within a segment, and only a sinusoidal
            breeding season depends on time (None: its season mean).
        y : ndarray (m, n_state)
        idx : int ndarray (m,)

        Returns
        -------
        ndarray (m, n_state)
        """
        out = np.empty_like(y)
        self._fn(t, y, self.columns(idx), out)
        return out


def rhs(web: FoodWeb, p: WebParams, c: Controls, y: np.ndarray, idx, t=None) -> np.ndarray:
    """Right-hand side for members ``idx`` (see the module docstring for the equations; the terms
    are declared in :mod:`impact.model.terms`).

    Parameters
    ----------
    y : ndarray (m, n_state)
    idx : int ndarray (m,)
        Member indices into ``p`` and ``c``.
    t : ndarray (m,), optional
        Times (only a sinusoidal breeding season depends on them; None: its season mean).

    Returns
    -------
    ndarray (m, n_state)
    """
    return WebRHS(web, p, c)(t, y, np.asarray(idx))


def _birth_text(case: Case, s, sterile: set[str]) -> str:
    """The births term of one species as text ('' when it has none)."""
    n = s.name
    birth = []
    if s.growth in ("logistic", "exponential"):
        ben = [u.partner for u in case.mutualism if u.beneficiary == n and not u.obligate]
        need = [u.partner for u in case.mutualism if u.beneficiary == n and u.obligate]
        g = f"r_{n}·{n}" + (f"·(1 + Σ β·P/(H+P) for P in {', '.join(ben)})" if ben else "")
        if len(need) == 1:
            g += f"·{need[0]}/(H_o+{need[0]})"
        elif need:
            g += f"·(1 − Π H_o/(H_o+P) for P in {', '.join(need)})"
        birth.append(g)
    birth += [f"e·I({f.resource})·{n}" for f in case.feeding if f.consumer == n]
    if not birth:
        return ""
    seasonal = s.breeding_season is not None or s.breeding_amplitude is not None
    scale = ("φ·s(t)" if seasonal else "φ") + "·(1−f)" + (f"·{n}/({n}+S)" if n in sterile else "")
    return f"{scale}·[{' + '.join(birth)}]"


def equations(case: Case) -> list[str]:
    """Human-readable equations of the built model, one line per state variable, then the
    definitions of the terms they use (units in README's case-file tables)."""
    lines = []
    sterile = {iv.species for iv in case.interventions if iv.kind == "sterile-release"}
    juvenile = {s.matures_into: s.name for s in case.species if s.matures_into is not None}
    stage_births = []
    for s in case.species:
        n = s.name
        terms = []
        births = _birth_text(case, s, sterile)
        if s.matures_into is not None:
            terms.append(f"births of {s.matures_into}")
        if n in juvenile:
            terms.append(f"μ_{juvenile[n]}·{juvenile[n]}")
            if births:
                stage_births.append(f"births of {n} (born as {juvenile[n]}) = {births}")
        elif births:
            terms.append(births)
        terms = [" + ".join(terms)] if terms else []
        if s.growth == "logistic":
            comps = [c.competitor for c in case.competition if c.species == n]
            crowd = n + "".join(f" + α·{x}" for x in comps)
            terms.append(f"− r_{n}·{n}·({crowd})/(κ·K_{n})")
        if s.crowding_mortality != 0.0:
            terms.append(f"− μ_{n}·{n}²")
        if s.matures_into is not None:
            terms.append(f"− μ_{n}·{n}")
        if s.mortality != 0.0:
            terms.append(f"− m_{n}·{n}")
        for f in case.feeding:
            if f.resource == n:
                terms.append(f"− I_{f.consumer}({n})·{f.consumer}")
        harvested = any(iv.species == n and iv.kind == "press-harvest" for iv in case.interventions)
        if harvested:
            terms.append(f"− q·{n}")
        lines.append(f"d{n}/dt = " + " ".join(terms) if terms else f"d{n}/dt = 0")
    if case.carrion is not None:
        scav = [f.consumer for f in case.feeding if f.resource == CARRION]
        lines.append("dcarrion/dt = Σ yield·(m·N + harvest carcasses) − δ·carrion"
                     + "".join(f" − I_{x}(carrion)·{x}" for x in scav))
    lines += stage_births
    lines.append("I = a·R (type I), a·R/D (type II), a·R²/D (type III), a·R/D (Beddington–DeAngelis) with "
                 "D = 1 + Σ a·h·R^q over the consumer's saturating links + γ·C for a Beddington–DeAngelis consumer C")
    if any(u.obligate for u in case.mutualism):
        lines.append("obligate mutualism: births × P/(H_o + P), none without the partner P (Holland & DeAngelis 2010)")
    if any(s.breeding_season is not None for s in case.species):
        lines.append(f"s(t) = 1 in the breeding {case.seasons.part_name}s of each season, the declared outside level elsewhere")
    if any(s.breeding_amplitude is not None for s in case.species):
        lines.append(f"s(t) = 1 + A·cos(2π(t − t_peak)/{case.seasons.length:g}) for a sinusoidal breeding season "
                     f"(t_peak the middle of the peak {case.seasons.part_name})")
    if sterile:
        lines.append("S = sterile density × competitiveness while a sterile release acts (Knipling 1955)")
    for s in case.species:
        if s.allee == "mate-finding":
            lines.append(f"mate finding: births of {s.name} × {s.name}/({s.name} + θ), θ = {s.allee_threshold} "
                         "(Boukal & Berec 2002)")
        elif s.allee == "strong":
            lines.append(f"strong Allee effect: the logistic growth of {s.name} × ({s.name}/A − 1), "
                         f"A = {s.allee_threshold} (Courchamp, Berec & Gascoigne 2008)")
        elif s.allee == "predator-dilution":
            lines.append(f"predator dilution: {s.name} loses D·{s.name}/({s.name} + h) to a generalist predator "
                         f"with a saturating response, D = {s.dilution_rate}, h = {s.allee_threshold} "
                         "(Gascoigne & Lipcius 2004)")
    if juvenile:
        lines.append("life stages: an adult's births are born into its juvenile stage, which matures into the "
                     "adult at rate μ (de Roos & Persson 2013)")
    return lines
