"""The constituent catalogue: extended Doodson numbers, compound rules and speeds.

Each astronomical constituent is defined by its extended Doodson numbers
``(tau, s, h, p, N', p1, offset)``: the integer multiples of the astronomical
arguments (see :mod:`predictor.astro`) plus a phase offset in quarter cycles (90 deg),
so that ``V = i1 tau + i2 s + i3 h + i4 p + i5 N' + i6 p1 + 90 deg * i7``.
Shallow-water compounds are defined by their parents (``MS4 = M2 + S2``,
``2MK3 = 2 M2 - K1``); their Doodson numbers, speeds and nodal corrections follow.
Speeds are derived from :data:`predictor.astro.ARGUMENT_RATES`, never typed in.

Doodson numbers were converted from Schureman's (1958) Table 2 arguments (written
with T, the hour angle of the mean sun, T = tau - h + s + 180 deg) to the tau-based
form of Foreman (1977); the conversions were done by hand from memory of those tables
and are checked by the speed tests in ``tests/test_constituents.py``.

The ``nodal_kind`` of each astronomical constituent names the Schureman formula for
its nodal factor f and correction u (see :mod:`predictor.nodal`).  Minor constituents
whose formula is not in Schureman are given the kind of the term they derive from.

References
----------
Doodson, A. T. (1921). Proc. R. Soc. A 100, 305-329.
Schureman, P. (1958). Manual of Harmonic Analysis and Prediction of Tides. US C&GS
Special Publication 98, Table 2.
Foreman, M. G. G. (1977, rev. 2004). Pacific Marine Science Report 77-10, Appendix.
"""
from __future__ import annotations

import difflib
from dataclasses import dataclass, field

import numpy as np

from predictor.astro import ARGUMENT_RATES

__all__ = ["Constituent", "CATALOGUE", "EQUILIBRIUM_AMPLITUDE", "get", "names", "doodson_matrix",
           "speeds", "equilibrium_amplitude"]


@dataclass(frozen=True)
class Constituent:
    """One tidal constituent.

    Attributes
    ----------
    name : str
        Standard name (``"M2"``, ``"Mf"``, ``"2MK3"``).
    doodson : tuple of int
        Extended Doodson numbers (tau, s, h, p, N', p1, offset in quarter cycles).
    speed : float
        Angular speed [deg/h].
    species : int
        Cycles per lunar day (0 long-period ... 8 eighth-diurnal).
    nodal_kind : str or None
        Name of the nodal formula for astronomical constituents, None for compounds.
    parents : tuple of (str, int)
        Parent constituents and coefficients for compounds, empty otherwise.
    """

    name: str
    doodson: tuple
    speed: float
    species: int
    nodal_kind: str | None = None
    parents: tuple = field(default_factory=tuple)

    @property
    def frequency(self) -> float:
        """Frequency [cycles/h]."""
        return self.speed / 360.0


# name, Doodson (tau, s, h, p, N', p1, quarter cycles), nodal kind.
# Converted from Schureman (1958) Table 2 (from memory), cf. Foreman (1977).
_ASTRONOMICAL = [
    # long period
    ("Sa", (0, 0, 1, 0, 0, 0, 0), "solar"),
    ("Ssa", (0, 0, 2, 0, 0, 0, 0), "solar"),
    ("Msm", (0, 1, -2, 1, 0, 0, 0), "Mm"),
    ("Mm", (0, 1, 0, -1, 0, 0, 0), "Mm"),
    ("Mf", (0, 2, 0, 0, 0, 0, 0), "Mf"),
    ("Mtm", (0, 3, 0, -1, 0, 0, 0), "Mf"),
    ("MSqm", (0, 4, -2, 0, 0, 0, 0), "Mf"),
    # diurnal
    ("2Q1", (1, -3, 0, 2, 0, 0, -1), "O1"),
    ("SIG1", (1, -3, 2, 0, 0, 0, -1), "O1"),
    ("Q1", (1, -2, 0, 1, 0, 0, -1), "O1"),
    ("RHO1", (1, -2, 2, -1, 0, 0, -1), "O1"),
    ("O1", (1, -1, 0, 0, 0, 0, -1), "O1"),
    ("M1", (1, 0, 0, 1, 0, 0, 1), "M1"),
    ("CHI1", (1, 0, 2, -1, 0, 0, 1), "J1"),
    ("PI1", (1, 1, -3, 0, 0, 1, -1), "solar"),
    ("P1", (1, 1, -2, 0, 0, 0, -1), "solar"),
    ("S1", (1, 1, -1, 0, 0, 0, 2), "solar"),
    ("K1", (1, 1, 0, 0, 0, 0, 1), "K1"),
    ("PSI1", (1, 1, 1, 0, 0, -1, 1), "solar"),
    ("PHI1", (1, 1, 2, 0, 0, 0, 1), "solar"),
    ("THE1", (1, 2, -2, 1, 0, 0, 1), "J1"),
    ("J1", (1, 2, 0, -1, 0, 0, 1), "J1"),
    ("OO1", (1, 3, 0, 0, 0, 0, 1), "OO1"),
    ("UPS1", (1, 4, 0, -1, 0, 0, 1), "OO1"),
    # semidiurnal
    ("2N2", (2, -2, 0, 2, 0, 0, 0), "M2"),
    ("MU2", (2, -2, 2, 0, 0, 0, 0), "M2"),
    ("N2", (2, -1, 0, 1, 0, 0, 0), "M2"),
    ("NU2", (2, -1, 2, -1, 0, 0, 0), "M2"),
    ("M2", (2, 0, 0, 0, 0, 0, 0), "M2"),
    ("LDA2", (2, 1, -2, 1, 0, 0, 2), "M2"),
    ("L2", (2, 1, 0, -1, 0, 0, 2), "L2"),
    ("T2", (2, 2, -3, 0, 0, 1, 0), "solar"),
    ("S2", (2, 2, -2, 0, 0, 0, 0), "solar"),
    ("R2", (2, 2, -1, 0, 0, -1, 2), "solar"),
    ("K2", (2, 2, 0, 0, 0, 0, 0), "K2"),
    # terdiurnal
    ("M3", (3, 0, 0, 0, 0, 0, 2), "M3"),
]

# Shallow-water and compound constituents: name, ((parent, coefficient), ...).
_COMPOUNDS = [
    ("MSf", (("S2", 1), ("M2", -1))),
    ("SO1", (("S2", 1), ("O1", -1))),
    ("MNS2", (("M2", 1), ("N2", 1), ("S2", -1))),
    ("2SM2", (("S2", 2), ("M2", -1))),
    ("MKS2", (("M2", 1), ("K2", 1), ("S2", -1))),
    ("MSN2", (("M2", 1), ("S2", 1), ("N2", -1))),
    # MO3 has the same speed as 2MK3: the two can never be separated in one fit.
    ("MO3", (("M2", 1), ("O1", 1))),
    ("SO3", (("S2", 1), ("O1", 1))),
    ("MK3", (("M2", 1), ("K1", 1))),
    ("SK3", (("S2", 1), ("K1", 1))),
    ("2MK3", (("M2", 2), ("K1", -1))),
    ("MN4", (("M2", 1), ("N2", 1))),
    ("M4", (("M2", 2),)),
    ("SN4", (("S2", 1), ("N2", 1))),
    ("MS4", (("M2", 1), ("S2", 1))),
    ("MK4", (("M2", 1), ("K2", 1))),
    ("S4", (("S2", 2),)),
    ("SK4", (("S2", 1), ("K2", 1))),
    ("2MK5", (("M2", 2), ("K1", 1))),
    ("2SK5", (("S2", 2), ("K1", 1))),
    ("2MN6", (("M2", 2), ("N2", 1))),
    ("M6", (("M2", 3),)),
    ("2MS6", (("M2", 2), ("S2", 1))),
    ("2MK6", (("M2", 2), ("K2", 1))),
    ("2SM6", (("S2", 2), ("M2", 1))),
    ("MSK6", (("M2", 1), ("S2", 1), ("K2", 1))),
    ("3MK7", (("M2", 3), ("K1", 1))),
    ("M8", (("M2", 4),)),
]


def _speed(doodson) -> float:
    return float(np.dot(np.asarray(doodson[:6], dtype=float), ARGUMENT_RATES))


def _build() -> dict[str, Constituent]:
    cat: dict[str, Constituent] = {}
    for name, d, kind in _ASTRONOMICAL:
        cat[name] = Constituent(name, tuple(d), _speed(d), abs(d[0]), kind, ())
    for name, parents in _COMPOUNDS:
        d = np.zeros(7, dtype=int)
        for parent, c in parents:
            d += c * np.asarray(cat[parent].doodson, dtype=int)
        d[6] = ((d[6] + 1) % 4) - 1  # quarter cycles kept in -1..2
        d = tuple(int(x) for x in d)
        cat[name] = Constituent(name, d, _speed(d), abs(d[0]), None, tuple(parents))
    # Catalogue order: by species, then speed.
    ordered = sorted(cat.values(), key=lambda c: (c.species, c.speed))
    return {c.name: c for c in ordered}


#: Ordered mapping name -> :class:`Constituent` (by species, then speed).
CATALOGUE: dict[str, Constituent] = _build()

_FOLDED = {name.upper(): name for name in CATALOGUE}
if len(_FOLDED) != len(CATALOGUE):  # pragma: no cover - guards the table above
    raise RuntimeError("constituent names must be unique ignoring case")
# Other spellings in common use.
_ALIASES = {"LAM2": "LDA2", "LAMBDA2": "LDA2", "SIGMA1": "SIG1", "THETA1": "THE1",
            "RHO": "RHO1"}


def get(name: str) -> Constituent:
    """Look up a constituent by name, ignoring case.

    Parameters
    ----------
    name : str
        Constituent name, e.g. ``"M2"``, ``"mf"``, ``"LAM2"``.

    Returns
    -------
    Constituent

    Raises
    ------
    KeyError
        For an unknown name; the message lists close matches.
    """
    key = str(name).strip().upper()
    key = _ALIASES.get(key, key)
    if key in _FOLDED:
        return CATALOGUE[_FOLDED[key]]
    if key in CATALOGUE:
        return CATALOGUE[key]

    close = difflib.get_close_matches(key, list(_FOLDED), n=3, cutoff=0.5)
    hint = f"; did you mean {', '.join(_FOLDED[c] for c in close)}?" if close else ""
    raise KeyError(f"unknown tidal constituent {name!r}{hint} (known: {', '.join(CATALOGUE)})")


def names() -> list[str]:
    """All catalogue names in catalogue order."""
    return list(CATALOGUE)


def doodson_matrix(names_) -> np.ndarray:
    """Extended Doodson numbers of the named constituents, shape (k, 7) [integers]."""
    return np.array([get(n).doodson for n in names_], dtype=float).reshape(-1, 7)


def speeds(names_) -> np.ndarray:
    """Speeds of the named constituents [deg/h], shape (k,)."""
    return np.array([get(n).speed for n in names_], dtype=float)


# Amplitudes of the degree-2 equilibrium tide [m] for the catalogue's Doodson numbers and
# phase offsets, all positive in this convention. The equilibrium tide of a constituent of
# species 0, 1, 2 at geocentric latitude phi and east longitude lam is
#   A f (1/2 - 3/2 sin^2 phi) cos(V + u),  A f sin(2 phi) cos(V + u + lam),
#   A f cos^2(phi) cos(V + u + 2 lam).
# Values from the Cartwright & Tayler (1971) / Cartwright & Edden (1973) tables as
# tabulated in tidal-model documentation, quoted from memory (not copied from the papers).
# tests/test_equilibrium.py checks each against a harmonic analysis of the equilibrium tide
# computed from pyerfa's Moon and Sun (agreement within 3 %, 4 % for L2 and Mf). Used for
# inference of unresolved constituents (:mod:`predictor.fit`) and for the convention checks.
EQUILIBRIUM_AMPLITUDE = {
    # long period
    "Mm": 0.022026, "Mf": 0.041742, "Ssa": 0.019446,
    # diurnal
    "Q1": 0.019256, "O1": 0.100514, "P1": 0.046843, "K1": 0.141565, "J1": 0.007915,
    # semidiurnal
    "2N2": 0.006141, "MU2": 0.007408, "N2": 0.046398, "NU2": 0.008811, "M2": 0.242334,
    "L2": 0.006694, "T2": 0.006588, "S2": 0.112841, "K2": 0.030704,
}


def equilibrium_amplitude(name: str) -> float:
    """Amplitude of a constituent in the degree-2 equilibrium tide [m].

    Parameters
    ----------
    name : str
        Constituent name (any case).

    Returns
    -------
    float
        Amplitude A [m] before the latitude factor (see :data:`EQUILIBRIUM_AMPLITUDE`).

    Raises
    ------
    KeyError
        The constituent has no tabulated equilibrium amplitude here.

    References
    ----------
    Cartwright, D. E., Tayler, R. J. (1971). Geophys. J. R. Astr. Soc. 23, 45-74;
    Cartwright, D. E., Edden, A. C. (1973). Geophys. J. R. Astr. Soc. 33, 253-264
    (values from memory).
    """
    canon = get(name).name
    if canon not in EQUILIBRIUM_AMPLITUDE:
        raise KeyError(f"no equilibrium amplitude tabulated for {canon} "
                       f"(known: {', '.join(EQUILIBRIUM_AMPLITUDE)})")
    return EQUILIBRIUM_AMPLITUDE[canon]
