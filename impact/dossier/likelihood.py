"""Calibrated words for probabilities, shown beside the number they stand for.

The scale is the likelihood scale of the IPCC uncertainty guidance for lead authors
(Mastrandrea et al. 2010, "Guidance note for lead authors of the IPCC Fifth Assessment
Report on consistent treatment of uncertainties", Table 1), from memory of that table:

=========================  ==================
term                       probability
=========================  ==================
virtually certain          99–100 %
very likely                90–100 %
likely                     66–100 %
about as likely as not     33–66 %
unlikely                   0–33 %
very unlikely              0–10 %
exceptionally unlikely     0–1 %
=========================  ==================

The published ranges nest; a probability gets the most specific term whose range holds it.
At a shared edge (e.g. exactly 66 %) the term nearer the end of the scale wins, as the
ranges are closed at 0 and 100 %.
"""

from __future__ import annotations

import math

# (lower edge inclusive, term), most specific first, for probabilities at or above one half
UPPER_TERMS = ((0.99, "virtually certain"), (0.90, "very likely"), (0.66, "likely"))
# (upper edge inclusive, term), most specific first, for probabilities below one half
LOWER_TERMS = ((0.01, "exceptionally unlikely"), (0.10, "very unlikely"), (0.33, "unlikely"))
MIDDLE_TERM = "about as likely as not"


def likelihood_term(p: float) -> str:
    """The calibrated term for probability ``p`` (0 ≤ p ≤ 1); ``"not estimated"`` for NaN."""
    if p is None or (isinstance(p, float) and math.isnan(p)):
        return "not estimated"
    if not 0.0 <= p <= 1.0:
        raise ValueError(f"probability must lie in [0, 1], got {p!r}")
    for edge, term in UPPER_TERMS:
        if p >= edge:
            return term
    for edge, term in LOWER_TERMS:
        if p <= edge:
            return term
    return MIDDLE_TERM
