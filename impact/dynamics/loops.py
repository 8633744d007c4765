"""Loop analysis of a signed digraph in exact integer arithmetic: press responses and their determinacy.

A qualitatively specified community matrix ``A`` holds −1, 0 or +1 in ``A[i, j]``, the sign of the
direct effect of species j on the growth of species i near equilibrium (Levins 1974; Puccia &
Levins 1985). For a stable equilibrium, the response of species i to a sustained positive press
on the growth of species j is ``(−A⁻¹)[i, j] = adj(−A)[i, j] / det(−A)`` with ``det(−A) > 0``,
so the sign of the response is the sign of the classical adjoint ``adj(−A)[i, j]`` whatever the
interaction strengths, as long as they keep the signs (Dambacher, Li & Rossignol 2002, Ecology
83:1372–1385, eq. 3–5).

``adj(−A)[i, j]`` is the net number of complementary feedback terms; the total number of terms,
positive and negative, is the permanent of the same minor of ``|A|`` (the absolute feedback
matrix ``T``). Their quotient ``W = |adj(−A)| / T`` is the weighted prediction: 1 when every
term has the same sign (the sign is fixed by the structure alone), near 0 when the terms
cancel (the sign depends on the interaction strengths; Dambacher et al. 2002, eq. 7;
Dambacher et al. 2003, American Naturalist 161:876–888). Where ``T`` is 0 no term links the two
species and the response is zero for any strengths: its weight is 1 here.

Everything is computed with Python integers (fraction-free Bareiss elimination for the
determinants, Ryser's formula for the permanents), never in floating point, so a response that is
exactly zero is reported as zero however large the web.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


def bareiss_determinant(rows: list[list[int]]) -> int:
    """Determinant of a square integer matrix by fraction-free Gaussian elimination (Bareiss 1968).

    Parameters
    ----------
    rows : list of n lists of n int

    Returns
    -------
    int
        The exact determinant (1 for the empty matrix).
    """
    a = [list(map(int, r)) for r in rows]
    n = len(a)
    sign, prev = 1, 1
    for k in range(n - 1):
        if a[k][k] == 0:
            swap = next((i for i in range(k + 1, n) if a[i][k] != 0), None)
            if swap is None:
                return 0
            a[k], a[swap] = a[swap], a[k]
            sign = -sign
        pivot = a[k][k]
        for i in range(k + 1, n):
            ai, aik = a[i], a[i][k]
            ak = a[k]
            for j in range(k + 1, n):
                # exact: Bareiss' theorem makes every quotient an integer
                ai[j] = (ai[j] * pivot - aik * ak[j]) // prev
        prev = pivot
    return sign * a[n - 1][n - 1] if n else 1


def ryser_permanent(m: np.ndarray) -> int:
    """Permanent of a non-negative integer matrix by Ryser's inclusion–exclusion formula (Ryser 1963).

    Parameters
    ----------
    m : ndarray (n, n) of non-negative int

    Returns
    -------
    int
        The exact permanent (1 for the empty matrix). Sums are taken in int64 when the
        largest possible term (product of the row sums) times 2ⁿ fits, else in Python integers.
    """
    m = np.asarray(m, dtype=np.int64)
    n = m.shape[0]
    if n == 0:
        return 1
    rows = m.sum(axis=1)
    if (rows == 0).any():
        return 0
    bound = int(np.prod([int(r) for r in rows], dtype=object)) << n
    dtype = np.int64 if bound < 2 ** 62 else object
    subsets = ((np.arange(1, 2 ** n)[:, None] >> np.arange(n)) & 1).astype(dtype)  # (2ⁿ−1, n) column subsets
    sums = subsets @ m.T.astype(dtype)  # (2ⁿ−1, n): row sums over each subset's columns
    prods = np.prod(sums, axis=1)
    signs = np.where((n - subsets.sum(axis=1)) % 2 == 0, 1, -1).astype(dtype)
    return int((signs * prods).sum())


def permanent_minors(m: np.ndarray) -> np.ndarray:
    """Permanents of every minor of a non-negative integer matrix, by one pass of Ryser's formula.

    Parameters
    ----------
    m : ndarray (n, n) of non-negative int

    Returns
    -------
    ndarray (n, n) of object (Python int)
        ``out[r, c]`` is the permanent of ``m`` without row r and column c. Ryser's sum for that
        minor runs over the column subsets S without c, of the products over the rows other than
        r of the row sums over S; the products leaving out one row come from prefix and suffix
        products (no division), so all n² minors cost one pass over the 2ⁿ subsets.
    """
    m = np.asarray(m, dtype=np.int64)
    n = m.shape[0]
    if n == 1:
        return np.ones((1, 1), dtype=object)
    rows = m.sum(axis=1)
    bound = int(np.prod([max(int(r), 1) for r in rows], dtype=object)) << n
    dtype = np.int64 if bound < 2 ** 62 else object
    subsets = ((np.arange(2 ** n)[:, None] >> np.arange(n)) & 1).astype(dtype)  # (2ⁿ, n) column subsets
    sums = subsets @ m.T.astype(dtype)  # (2ⁿ, n): each row's sum over each subset's columns
    ones = np.ones((2 ** n, 1), dtype=dtype)
    before = np.concatenate([ones, np.cumprod(sums[:, :-1], axis=1)], axis=1)
    after = np.concatenate([np.cumprod(sums[:, :0:-1], axis=1)[:, ::-1], ones], axis=1)
    without_row = before * after  # (2ⁿ, n): product over every row but r
    size = subsets.sum(axis=1)
    signs = np.where((n - 1 - size) % 2 == 0, 1, -1).astype(dtype)
    outside = (1 - subsets) * signs[:, None]  # (2ⁿ, n): the subset leaves column c out, with its sign
    out = (without_row.T @ outside).astype(object)  # (n rows r, n columns c)
    return np.vectorize(int, otypes=[object])(out)


@dataclass(frozen=True)
class PressPrediction:
    """Qualitative press responses of a signed community matrix.

    Attributes
    ----------
    net : ndarray (n, n) of object (Python int)
        ``adj(−A)``: ``net[i, j]`` is the net number of complementary feedback terms in the
        response of i to a positive press on j.
    terms : ndarray (n, n) of object (Python int)
        Absolute feedback matrix ``T``: the total number of those terms.
    determinant : int
        ``det(−A)``, the system's overall feedback (positive at a stable equilibrium).
    """

    net: np.ndarray
    terms: np.ndarray
    determinant: int

    @property
    def sign(self) -> np.ndarray:
        """(n, n) int: sign of each response to a positive press (0 where the net is 0)."""
        return np.sign(self.net.astype(float)).astype(int) if self.net.size else np.zeros((0, 0), int)

    @property
    def weight(self) -> np.ndarray:
        """(n, n) float: weighted predictions |net| / terms (1 where no term links the pair)."""
        out = np.ones(self.net.shape)
        for idx in np.ndindex(self.net.shape):
            t = int(self.terms[idx])
            if t:
                out[idx] = abs(int(self.net[idx])) / t
        return out


def check_signs(a) -> np.ndarray:
    """``a`` as a square int matrix of −1, 0, +1, or ValueError naming the parameter."""
    arr = np.asarray(a)
    if arr.ndim != 2 or arr.shape[0] != arr.shape[1]:
        raise ValueError(f"signs: a square matrix is needed, got shape {arr.shape}")
    if not np.isin(arr, (-1, 0, 1)).all():
        raise ValueError("signs: entries must be -1, 0 or +1")
    return arr.astype(np.int64)


def press_prediction(signs) -> PressPrediction:
    """Adjoint of −A, absolute feedback matrix and det(−A) of a signed community matrix.

    Parameters
    ----------
    signs : array-like (n, n) of −1, 0, +1
        ``signs[i, j]``: sign of the direct effect of j on the growth of i.

    Returns
    -------
    PressPrediction
        ``net[i, j] = adj(−A)[i, j] = (−1)^(i+j) det((−A) without row j and column i)`` and
        ``terms[i, j] = perm(|A| without row j and column i)``.
    """
    a = check_signs(signs)
    n = a.shape[0]
    neg = (-a).tolist()
    net = np.empty((n, n), dtype=object)
    terms = np.empty((n, n), dtype=object)
    minors = permanent_minors(np.abs(a)) if n else np.empty((0, 0), dtype=object)
    for i in range(n):
        for j in range(n):
            minor = [r[:i] + r[i + 1:] for k, r in enumerate(neg) if k != j]
            net[i, j] = (-1) ** (i + j) * bareiss_determinant(minor)
            terms[i, j] = minors[j, i]
    return PressPrediction(net, terms, bareiss_determinant(neg))
