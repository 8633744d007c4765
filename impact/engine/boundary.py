"""The one check every array passes before it is handed to compiled code.

numba's compiled functions index their arrays without bounds checks: an array with one state
column too few makes the kernel read and write past its end, and the process dies with a
segmentation fault instead of an error. :func:`check_kernel_arrays` is therefore called by the
Python side of every compiled entry point, just before the call, with the exact arrays it passes.
It checks the structure table itself (its length and every index in it against the web's size),
then each array's dtype, C-contiguity and shape against the entry point's contract below, and the
index arrays' values (a jump's species, an output slot, a section column) against the sizes they
index. It raises :class:`KernelArgumentError` naming the entry point, the argument and what was
expected; it never copies or converts.

Shapes are written with the sizes of the web: ``n`` state columns and ``P`` coefficient columns,
both read from the structure table (layout in :mod:`impact.engine.kernel`), and with names bound
by the first array that has them (``m`` members, ``E`` jumps, ``T`` output slots, ``C`` section
capacity); ``K+1`` is one more than ``K``.
"""

from __future__ import annotations

import numpy as np

from impact.model.terms import ALLEE_KINDS, APPENDED_COEFFICIENTS, LINK_COEFFICIENTS, SPECIES_COEFFICIENTS

F8, I8, I1 = np.dtype(np.float64), np.dtype(np.int64), np.dtype(np.int8)

# entry point -> argument -> (dtype, shape)
CONTRACTS: dict[str, dict[str, tuple[np.dtype, tuple]]] = {
    "segment": {
        "coef": (F8, ("m", "P")), "y0": (F8, ("m", "n")), "h0": (F8, ("m",)), "rtol": (F8, ("n",)),
        "atol": (F8, ("n",)), "y_out": (F8, ("m", "n")), "ymin": (F8, ("m", "n")), "ymax": (F8, ("m", "n")),
        "h_out": (F8, ("m",)), "reason": (I1, ("m",)), "nsteps": (I8, ("m",)),
    },
    "run_members": {
        "times": (F8, ("K+1",)), "coef": (F8, ("G", "m", "P")), "y0": (F8, ("m", "n")), "h0": (F8, ("m",)),
        "jump_start": (I8, ("K+2",)), "jump_kind": (I8, ("E",)), "jump_species": (I8, ("E",)),
        "jump_yield": (F8, ("E",)), "jump_value": (F8, ("m", "E")), "jump_aux": (F8, ("m", "E")),
        "rtol": (F8, ("n",)), "atol": (F8, ("n",)), "slot_of": (I8, ("K+1",)),
        "states": (F8, ("m", "T", "n")), "cummin": (F8, ("m", "T", "n")), "cummax": (F8, ("m", "T", "n")),
        "reason": (I1, ("m",)), "h_out": (F8, ("m",)),
    },
    "flow_batch": {
        "coef": (F8, ("m", "P")), "y0": (F8, ("m", "n")), "section": (I8, ("m",)), "rtol": (F8, ("n",)),
        "atol": (F8, ("n",)), "y_out": (F8, ("m", "n")), "lg": (F8, ("m",)), "low": (F8, ("m", "n")),
        "high": (F8, ("m", "n")), "acc": (F8, ("m", "n")), "sec_vals": (F8, ("m", "C")),
        "sec_count": (I8, ("m",)), "reason": (I1, ("m",)), "nsteps": (I8, ("m",)),
    },
    "counted_run": {
        "coef": (F8, ("m", "P")), "y": (F8, ("m", "n")), "cols": (I8, ("k",)), "per_unit": (F8, ("k",)),
        "x0": (I8, ("m", "k")), "rtol": (F8, ("n",)), "atol": (F8, ("n",)), "out": (F8, ("m", "n")),
        "lo": (F8, ("m", "n")), "hi": (F8, ("m", "n")),
    },
    "batch_jvp": {
        "coef": (F8, ("m", "P")), "y": (F8, ("m", "n")), "v": (F8, ("m", "n")), "out": (F8, ("m", "n")),
        "jv": (F8, ("m", "n")),
    },
}


# arrays the compiled code writes into
WRITTEN = {"y_out", "ymin", "ymax", "h_out", "reason", "nsteps", "states", "cummin", "cummax", "lg", "low", "high",
            "acc", "sec_vals", "sec_count", "out", "jv", "lo", "hi"}


class KernelArgumentError(ValueError):
    """An array that does not meet a compiled entry point's contract (a defect of the caller, caught
    before the compiled code could read or write out of bounds).

    Attributes
    ----------
    entry, argument : str
        The compiled function and its argument.
    """

    def __init__(self, entry: str, argument: str, message: str):
        self.entry, self.argument = entry, argument
        super().__init__(f"{entry}: {argument}: {message}")


def structure_sizes(st) -> dict[str, int]:
    """Sizes the structure table declares, after checking the table: ``S``, ``n``, ``L``, ``P``.

    Parameters
    ----------
    st : int64 ndarray (HEADER + 4L + 2Cc + 2U + 2O + 4S,)

    Raises
    ------
    KernelArgumentError
        A table of another dtype or layout, inconsistent sizes, or an index outside the web.
    """
    from impact.engine.kernel import HEADER  # numba is loaded on first use only

    def bad(message):
        return KernelArgumentError("structure", "st", message)

    if not isinstance(st, np.ndarray) or st.dtype != I8 or st.ndim != 1 or not st.flags.c_contiguous:
        raise bad("must be a C-contiguous one-dimensional int64 array (impact.engine.web.pack_structure)")
    if st.shape[0] < HEADER:
        raise bad(f"has {st.shape[0]} entries, fewer than its {HEADER}-entry header")
    S, n, carrion, L, Cc, U, logistic, crowding, O = (int(x) for x in st[:HEADER])
    if S < 1 or min(L, Cc, U, O) < 0 or carrion not in (0, 1) or logistic not in (0, 1) or crowding not in (0, 1):
        raise bad(f"header {st[:HEADER].tolist()} is not a web's (species ≥ 1, counts ≥ 0, flags 0 or 1)")
    if n != S + carrion:
        raise bad(f"declares {n} state columns for {S} species and carrion flag {carrion}")
    length = HEADER + 4 * L + 2 * Cc + 2 * U + 2 * O + 5 * S
    if st.shape[0] != length:
        raise bad(f"has {st.shape[0]} entries; its header calls for {length}")
    at = HEADER
    parts = {}
    for name, size in (("consumer", L), ("resource", L), ("power", L), ("type1", L), ("pairs", 2 * (Cc + U + O)),
                       ("interference", S), ("sterile", S), ("adult", S), ("wave", S), ("allee", S)):
        parts[name] = st[at:at + size]
        at += size
    ranges = {"consumer": (0, S - 1), "resource": (-1, n - 1), "power": (1, 2), "type1": (0, 1),
              "pairs": (0, S - 1), "interference": (0, 1), "sterile": (0, 1), "adult": (-1, S - 1), "wave": (0, 1),
              "allee": (0, len(ALLEE_KINDS) - 1)}
    for name, (lo, hi) in ranges.items():
        values = parts[name]
        if values.size and (values.min() < lo or values.max() > hi):
            raise bad(f"{name} entries must lie in [{lo}, {hi}] for this web, found {values.min()}..{values.max()}")
    return {"S": S, "n": n, "L": L,
            "P": len(SPECIES_COEFFICIENTS) * S + len(LINK_COEFFICIENTS) * L + Cc + 2 * U + O + 1
            + len(APPENDED_COEFFICIENTS) * S}


def check_kernel_arrays(entry: str, st, **arrays) -> None:
    """Refuse any array that does not meet compiled entry point ``entry``'s contract.

    Parameters
    ----------
    entry : str
        A key of :data:`CONTRACTS`: ``"segment"``, ``"run_members"``, ``"flow_batch"``, ``"counted_run"`` or
        ``"batch_jvp"``.
    st : int64 ndarray
        The structure table passed with them (checked by :func:`structure_sizes`).
    **arrays : ndarray
        Every array argument of the entry point, by its name in :data:`CONTRACTS` (all required).

    Raises
    ------
    KernelArgumentError
        Naming the entry point, the argument, and the dtype, layout, shape or values expected.
    """
    contract = CONTRACTS[entry]
    missing = sorted(set(contract) - set(arrays))
    extra = sorted(set(arrays) - set(contract))
    if missing or extra:
        raise KernelArgumentError(entry, (missing or extra)[0], "missing" if missing else "not an argument of it")
    sizes: dict[str, int] = dict(structure_sizes(st))
    for name, (dtype, dims) in contract.items():
        a = arrays[name]
        if not isinstance(a, np.ndarray):
            raise KernelArgumentError(entry, name, f"must be a numpy array, not {type(a).__name__}")
        if a.dtype != dtype:
            raise KernelArgumentError(entry, name, f"must have dtype {dtype}, not {a.dtype}")
        if a.ndim != len(dims):
            raise KernelArgumentError(entry, name, f"must have shape ({', '.join(dims)}), got {a.shape}")
        if not a.flags.c_contiguous or (name in WRITTEN and not a.flags.writeable):
            raise KernelArgumentError(entry, name, "must be a C-contiguous" + (" writeable" if name in WRITTEN
                                                                                 else "") + " array")
        for axis, dim in enumerate(dims):
            symbol, _, plus = dim.partition("+")
            offset = int(plus or 0)
            if symbol not in sizes:
                sizes[symbol] = a.shape[axis] - offset
            if a.shape[axis] != sizes[symbol] + offset or sizes[symbol] < 0:
                raise KernelArgumentError(entry, name, f"must have shape ({', '.join(dims)}) with "
                                                       f"{symbol} = {sizes[symbol]}, got {a.shape}")
    _check_values(entry, sizes, arrays)


def _check_values(entry: str, sizes: dict, arrays: dict) -> None:
    """Index arrays within what they index (the compiled code trusts them)."""
    def within(name, lo, hi):
        a = arrays[name]
        if a.size and (a.min() < lo or a.max() > hi):
            raise KernelArgumentError(entry, name, f"entries must lie in [{lo}, {hi}], found {a.min()}..{a.max()}")

    if entry == "flow_batch":
        within("section", 0, sizes["n"] - 1)
    if entry == "counted_run":
        within("cols", 0, sizes["n"] - 1)
        within("x0", 0, np.iinfo(np.int64).max)
        y = arrays["y"]
        if not (np.isfinite(y).all() and (y >= 0).all()):
            raise KernelArgumentError(entry, "y", "must be finite and non-negative")
        if not (np.isfinite(arrays["per_unit"]).all() and (arrays["per_unit"] > 0).all()):
            raise KernelArgumentError(entry, "per_unit", "must be finite and positive")
    if entry != "run_members":
        return
    if sizes["G"] not in (1, sizes["K"]):
        raise KernelArgumentError(entry, "coef", f"must hold 1 or {sizes['K']} segments' rows, got {sizes['G']}")
    within("jump_start", 0, sizes["E"])
    if np.any(np.diff(arrays["jump_start"]) < 0):
        raise KernelArgumentError(entry, "jump_start", "must not decrease")
    within("jump_kind", 0, 2)
    within("jump_species", 0, sizes["n"] - 1)
    within("slot_of", -1, sizes["T"] - 1)
    culls_to_carrion = (arrays["jump_kind"] == 0) & (arrays["jump_yield"] >= 0)
    if culls_to_carrion.any() and sizes["n"] == sizes["S"]:
        raise KernelArgumentError(entry, "jump_yield", "a cull leaves carrion in a web without a carrion pool")
