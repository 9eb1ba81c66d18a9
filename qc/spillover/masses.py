"""Channel masses and the physically plausible spillover pairs they allow.

A channel name such as ``Nd145`` or ``145Nd`` carries an element and a mass number.
Signal spills only to neighbouring masses (M +/- 1), to other isotopes of the same
element, and to M + 16 (metal oxides); the estimators estimate only those pairs.
"""

from __future__ import annotations

import re
from collections.abc import Sequence

import numpy as np

_ELEMENTS = (
    "H He Li Be B C N O F Ne Na Mg Al Si P S Cl Ar K Ca Sc Ti V Cr Mn Fe Co Ni Cu Zn Ga Ge "
    "As Se Br Kr Rb Sr Y Zr Nb Mo Tc Ru Rh Pd Ag Cd In Sn Sb Te I Xe Cs Ba La Ce Pr Nd Pm "
    "Sm Eu Gd Tb Dy Ho Er Tm Yb Lu Hf Ta W Re Os Ir Pt Au Hg Tl Pb Bi Po At Rn Fr Ra Ac Th "
    "Pa U"
).split()
#: Atomic number of each element symbol (periodic table order).
_ATOMIC_NUMBER = {symbol: z for z, symbol in enumerate(_ELEMENTS, start=1)}
_ELEMENT_FIRST = re.compile(r"(?<![A-Za-z])([A-Z][a-z]?)\(?(\d{2,3})\)?(?!\d)")
_MASS_FIRST = re.compile(r"(?<!\d)(\d{2,3})([A-Z][a-z]?)(?![a-z])")
#: Mass shift of a metal oxide (+ one 16O).
OXIDE_SHIFT = 16


def channel_mass(name: str) -> tuple[str, int] | None:
    """Element symbol and mass number carried by a channel name, or None.

    Understands element-then-mass (``Nd145``, ``Nd(145)``, ``Nd145Di``, ``CD3_Er170``)
    and mass-then-element (``145Nd``, ``145Nd_CD3``). A candidate counts only when the
    symbol is a chemical element and the mass is plausible for it: stable nuclei have
    about 2Z to 2.6Z nucleons (from memory; the bound used is ``2Z - 2 <= A <= 2.7Z``),
    so ``CD45``, ``S100`` or ``CK19`` carry no mass.

    Examples
    --------
    >>> channel_mass("Nd145"), channel_mass("145Nd"), channel_mass("Ir191Di")
    (('Nd', 145), ('Nd', 145), ('Ir', 191))
    >>> channel_mass("CD45") is None, channel_mass("DNA1") is None
    (True, True)
    """
    name = str(name)
    candidates = [(m.start(), m.group(1), int(m.group(2))) for m in _ELEMENT_FIRST.finditer(name)]
    candidates += [(m.start(), m.group(2), int(m.group(1))) for m in _MASS_FIRST.finditer(name)]
    for _start, symbol, mass in sorted(candidates):
        z = _ATOMIC_NUMBER.get(symbol)
        if z is not None and 2 * z - 2 <= mass <= 2.7 * z:
            return symbol, mass
    return None


def plausible_pairs(channels: Sequence[str], *, all_pairs: bool = False) -> np.ndarray:
    """Which spillover entries to estimate: a (C, C) bool array, True at (source, receiver).

    Physically, signal spills only to the neighbouring masses (M +/- 1, abundance
    sensitivity), to other isotopes of the same element (isotopic impurity of the
    label) and to M + 16 (metal oxides). When channel names carry masses
    (:func:`channel_mass`), only those pairs are True. Pairs involving a channel whose
    name carries no mass cannot be ruled out and are True; so are all pairs when
    ``all_pairs`` is set. The diagonal is always False.

    Examples
    --------
    >>> plausible_pairs(["Nd142", "Nd143", "Gd158", "Ir191"]).astype(int).tolist()
    [[0, 1, 1, 0], [1, 0, 0, 0], [0, 0, 0, 0], [0, 0, 0, 0]]
    """
    n = len(channels)
    pairs = ~np.eye(n, dtype=bool)
    if all_pairs:
        return pairs
    masses = [channel_mass(c) for c in channels]
    for i, src in enumerate(masses):
        for j, dst in enumerate(masses):
            if i == j or src is None or dst is None:
                continue
            gap = dst[1] - src[1]
            pairs[i, j] = abs(gap) == 1 or src[0] == dst[0] or gap == OXIDE_SHIFT
    return pairs
