"""NACA 4-digit sections from the published thickness and camber equations.

A section is described on a unit chord: ``x`` runs from the leading edge
(``x = 0``) to the trailing edge (``x = 1``) and ``y`` is the thickness
direction. The half-thickness is

    y_t(x) = 5 t (0.2969 sqrt(x) - 0.1260 x - 0.3516 x^2 + 0.2843 x^3 + a4 x^4)

with ``a4 = -0.1015`` (the original, open trailing edge of thickness 0.021 t)
or ``a4 = -0.1036`` (the closed variant, y_t(1) = 0). The mean camber line is
the two-parabola line of maximum camber ``m`` at ``x = p``; thickness is laid
off perpendicular to it.

References
----------
Jacobs, Ward & Pinkerton (1933), NACA Report 460, "The characteristics of 78
related airfoil sections from tests in the variable-density wind tunnel".
Abbott & von Doenhoff (1959), *Theory of Wing Sections*, Dover, Ch. 6 (the
four-digit sections and the combination of thickness and mean line).
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError

__all__ = ["Section", "naca4", "parse_naca4", "cosine_stations"]

# Thickness coefficients a0..a3 shared by both trailing-edge variants.
_A = (0.2969, -0.1260, -0.3516, 0.2843)
_A4_OPEN = -0.1015
_A4_CLOSED = -0.1036

_CODE_RE = re.compile(r"^\s*(?:naca)?[\s_-]*(\d{4})\s*$", re.IGNORECASE)

# Fewest points a loop may have: two segments on each surface.
_MIN_POINTS = 5


def parse_naca4(code) -> tuple[str, float, float, float]:
    """Split a NACA 4-digit designation into its digits and parameters.

    Parameters
    ----------
    code : str — "0012", "NACA 0012", "naca2412", "NACA-4412" (case and
        separators are free; exactly four digits).

    Returns
    -------
    digits : str — the four digits.
    m : float — maximum camber, fraction of chord (first digit / 100).
    p : float — chordwise position of maximum camber, fraction of chord
        (second digit / 10).
    t : float — maximum thickness, fraction of chord (last two digits / 100).

    Raises
    ------
    InputError
        Not a string, not four digits, zero thickness, camber without a
        position (m > 0, p = 0), or a position without camber (m = 0, p > 0).
    """
    if not isinstance(code, str):
        raise InputError(
            f"a NACA 4-digit code must be a string such as '0012' or 'NACA 2412', got {code!r} "
            f"({type(code).__name__}); quote it so leading zeros are kept"
        )
    match = _CODE_RE.match(code)
    if match is None:
        raise InputError(
            f"{code!r} is not a NACA 4-digit code; expected four digits such as '0012', "
            "optionally prefixed by 'NACA' (e.g. 'NACA 2412')"
        )
    digits = match.group(1)
    m = int(digits[0]) / 100.0
    p = int(digits[1]) / 10.0
    t = int(digits[2:]) / 100.0
    if t == 0.0:
        raise InputError(
            f"NACA {digits} has zero thickness (last two digits '00'); give a thickness in per cent "
            "of chord, e.g. '0012' for 12 %"
        )
    if m > 0.0 and p == 0.0:
        raise InputError(
            f"NACA {digits} has camber {digits[0]} % but its position digit is 0; the camber line "
            "needs 0 < p < 1, e.g. '2412' (maximum camber at 40 % chord)"
        )
    if m == 0.0 and p > 0.0:
        raise InputError(
            f"NACA {digits} gives a camber position ({digits[1]}) but zero camber; a symmetric "
            f"section is written '00{digits[2:]}'"
        )
    return digits, m, p, t


def cosine_stations(segments: int) -> np.ndarray:
    """Chord stations clustered at both edges: x_i = (1 - cos(pi i / segments)) / 2.

    Parameters
    ----------
    segments : int — number of intervals (the result has ``segments + 1`` points).

    Returns
    -------
    (segments + 1,) float — fraction of chord, from 0 to 1 inclusive, increasing.
    """
    beta = np.linspace(0.0, np.pi, int(segments) + 1)
    x = 0.5 * (1.0 - np.cos(beta))
    x[0], x[-1] = 0.0, 1.0
    return x


def _readonly(a: np.ndarray) -> np.ndarray:
    a = np.ascontiguousarray(a, dtype=float)
    a.setflags(write=False)
    return a


@dataclass(frozen=True)
class Section:
    """A NACA 4-digit section on a unit chord, with its closed outline.

    Build it with :func:`naca4`. The outline is a closed loop of ``n`` points
    (``x``, ``y``), counter-clockwise, starting at the upper trailing-edge point,
    running over the upper surface to the leading edge (``x = y = 0``, always a
    point of the loop) and back along the lower surface; the closing point is
    not repeated. With a closed trailing edge the loop starts at the single
    trailing-edge point ``(1, 0)``; with an open trailing edge the segment from
    the last point (lower trailing edge) back to the first (upper trailing edge)
    is the blunt base.

    Parameters
    ----------
    code : str — the four digits, e.g. "2412".
    n : int — number of points on the loop (>= 5).
    closed_te : bool — True: closed trailing-edge coefficient -0.1036;
        False: the original -0.1015 (blunt base 0.021 t thick).

    Attributes
    ----------
    m, p, t : float — maximum camber, its position, maximum thickness (fractions of chord).
    x, y : (n,) float — loop coordinates, fraction of chord; read-only.
    upper_segments, lower_segments : int — chordwise intervals on each surface;
        equal when the loop allows it, otherwise the upper surface has one more.
    """

    code: str
    n: int = 161
    closed_te: bool = True
    m: float = field(init=False)
    p: float = field(init=False)
    t: float = field(init=False)
    x: np.ndarray = field(init=False, repr=False, compare=False)
    y: np.ndarray = field(init=False, repr=False, compare=False)
    upper_segments: int = field(init=False, repr=False)
    lower_segments: int = field(init=False, repr=False)

    def __post_init__(self):
        digits, m, p, t = parse_naca4(self.code)
        if isinstance(self.n, bool) or not isinstance(self.n, (int, np.integer)) or self.n < _MIN_POINTS:
            raise InputError(
                f"a section loop needs an integer number of points n >= {_MIN_POINTS}, got {self.n!r}; "
                "161 is a good default"
            )
        if not isinstance(self.closed_te, (bool, np.bool_)):
            raise InputError(f"closed_te must be True or False, got {self.closed_te!r}")
        set_ = object.__setattr__
        set_(self, "code", digits)
        set_(self, "n", int(self.n))
        set_(self, "closed_te", bool(self.closed_te))
        set_(self, "m", m)
        set_(self, "p", p)
        set_(self, "t", t)
        # Closed TE: n = ku + kl (TE and LE shared); open TE: n = ku + kl + 1.
        intervals = self.n if self.closed_te else self.n - 1
        ku = (intervals + 1) // 2
        kl = intervals - ku
        set_(self, "upper_segments", ku)
        set_(self, "lower_segments", kl)
        xu, yu = self.upper(cosine_stations(ku))
        xl, yl = self.lower(cosine_stations(kl))
        if self.closed_te:
            # Upper TE..LE, then lower without its LE and TE (both already present).
            xs = np.concatenate([xu[::-1], xl[1:-1]])
            ys = np.concatenate([yu[::-1], yl[1:-1]])
        else:
            xs = np.concatenate([xu[::-1], xl[1:]])
            ys = np.concatenate([yu[::-1], yl[1:]])
        set_(self, "x", _readonly(xs))
        set_(self, "y", _readonly(ys))

    def __reduce__(self):
        # Rebuild from the three defining fields (keeps the arrays read-only after
        # pickling, e.g. when a case is shipped to worker processes).
        return (Section, (self.code, self.n, self.closed_te))

    # -- the defining functions ------------------------------------------------
    @property
    def _a4(self) -> float:
        return _A4_CLOSED if self.closed_te else _A4_OPEN

    def thickness(self, x) -> np.ndarray:
        """Half-thickness y_t at chord stations.

        Parameters
        ----------
        x : (k,) float — fraction of chord, in [0, 1].

        Returns
        -------
        (k,) float — fraction of chord; half the thickness measured
        perpendicular to the camber line.
        """
        x = self._stations(x)
        a0, a1, a2, a3 = _A
        return 5.0 * self.t * (a0 * np.sqrt(x) + x * (a1 + x * (a2 + x * (a3 + x * self._a4))))

    def thickness_slope(self, x) -> np.ndarray:
        """Derivative dy_t/dx (dimensionless) at chord stations ``x`` (fraction of chord, > 0)."""
        x = self._stations(x)
        a0, a1, a2, a3 = _A
        with np.errstate(divide="ignore"):
            root = np.where(x > 0, 0.5 * a0 / np.sqrt(np.where(x > 0, x, 1.0)), np.inf)
        return 5.0 * self.t * (root + a1 + x * (2 * a2 + x * (3 * a3 + x * 4 * self._a4)))

    def camber(self, x) -> np.ndarray:
        """Mean camber line y_c (fraction of chord) at chord stations ``x`` (fraction of chord)."""
        x = self._stations(x)
        m, p = self.m, self.p
        if m == 0.0:
            return np.zeros_like(x)
        fore = m / p**2 * (2 * p * x - x**2)
        aft = m / (1 - p) ** 2 * ((1 - 2 * p) + 2 * p * x - x**2)
        return np.where(x <= p, fore, aft)

    def camber_slope(self, x) -> np.ndarray:
        """Camber-line slope dy_c/dx (dimensionless) at chord stations ``x`` (fraction of chord)."""
        x = self._stations(x)
        m, p = self.m, self.p
        if m == 0.0:
            return np.zeros_like(x)
        return np.where(x <= p, 2 * m / p**2 * (p - x), 2 * m / (1 - p) ** 2 * (p - x))

    def upper(self, x) -> tuple[np.ndarray, np.ndarray]:
        """Upper-surface points for camber-line stations ``x``.

        Parameters
        ----------
        x : (k,) float — fraction of chord, the parameter of the camber line.

        Returns
        -------
        xu, yu : (k,) float — fraction of chord; x_U = x - y_t sin(theta),
        y_U = y_c + y_t cos(theta), theta = arctan(dy_c/dx). ``xu`` differs from
        ``x`` on a cambered section (it dips slightly below 0 near the nose).
        """
        return self._surface(x, +1.0)

    def lower(self, x) -> tuple[np.ndarray, np.ndarray]:
        """Lower-surface points for camber-line stations ``x`` (see :meth:`upper`; the sign of y_t flips)."""
        return self._surface(x, -1.0)

    def _surface(self, x, sign: float):
        x = self._stations(x)
        yt = self.thickness(x)
        theta = np.arctan(self.camber_slope(x))
        return x - sign * yt * np.sin(theta), self.camber(x) + sign * yt * np.cos(theta)

    @staticmethod
    def _stations(x) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        if x.size and (not np.all(np.isfinite(x)) or x.min() < 0.0 or x.max() > 1.0):
            raise InputError(
                f"chord stations must lie in [0, 1] (fraction of chord), got values in "
                f"[{np.nanmin(x):.6g}, {np.nanmax(x):.6g}]"
            )
        return x

    # -- derived quantities ----------------------------------------------------
    @property
    def loop(self) -> np.ndarray:
        """(n, 2) float — the outline as one array (fraction of chord), counter-clockwise, not closed."""
        return np.column_stack([self.x, self.y])

    @property
    def area(self) -> float:
        """Area enclosed by the discretised loop (shoelace formula), fraction of chord squared.

        It converges to the exact area of the equations as ``n`` grows
        (error about 1e-5 at n = 161 for NACA 0012).
        """
        x, y = self.x, self.y
        return float(0.5 * np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y))

    @property
    def le_radius(self) -> float:
        """Leading-edge radius, fraction of chord: (5 * 0.2969 t)^2 / 2 = 1.10187 t^2.

        This is the osculating radius of the thickness equation at the nose and
        equals the published 1.1019 t^2 (Abbott & von Doenhoff 1959) to its
        printed digits.
        """
        return 0.5 * (5.0 * _A[0] * self.t) ** 2

    @property
    def te_thickness(self) -> float:
        """Distance between the upper and lower trailing-edge points, fraction of chord (0 if closed).

        The closed variant's coefficients sum to zero exactly (REFERENCES: -0.1036), so its trailing
        edge thickness is 0 by construction, not the -7e-17 its evaluation in floating point gives.
        """
        if self.closed_te:
            return 0.0
        return float(2.0 * self.thickness(np.array([1.0]))[0])

    @property
    def fold_ratio(self) -> float:
        """Largest y_t(x) * kappa_c(x): half-thickness over the camber line's radius of curvature.

        Dimensionless; 0 for a symmetric section. At 1 or more the perpendicular
        construction folds the concave (lower) side: offsets from neighbouring
        camber points cross. Only extreme codes get there (e.g. 7124: 1.3, with
        camber at 10 % chord); NACA 6224 gives 0.34.
        """
        if self.m == 0.0:
            return 0.0
        x = np.linspace(0.0, 1.0, 4001)
        curvature2 = np.where(x <= self.p, 2 * self.m / self.p**2, 2 * self.m / (1 - self.p) ** 2)
        kappa = curvature2 / (1.0 + self.camber_slope(x) ** 2) ** 1.5
        return float(np.max(self.thickness(x) * kappa))

    @property
    def is_symmetric(self) -> bool:
        """True when the section has no camber (m = 0)."""
        return self.m == 0.0


def naca4(code, n: int = 161, closed_te: bool = True) -> Section:
    """A NACA 4-digit section with a cosine-spaced closed outline, chord 1.

    Parameters
    ----------
    code : str — "0012", "NACA 0012", "naca2412": camber (per cent), position of
        maximum camber (tenths), thickness (per cent).
    n : int — number of points on the outline loop (the closing point is not
        repeated). The upper and lower surfaces share the leading-edge point and,
        when ``closed_te``, the trailing-edge point; their chord stations are
        cosine-spaced, x = (1 - cos beta)/2, so points cluster at both edges.
    closed_te : bool — True uses the closed trailing-edge coefficient -0.1036;
        False keeps the original -0.1015, whose blunt base (0.021 t thick) is
        the segment closing the loop.

    Returns
    -------
    Section
        Frozen; ``x``, ``y`` (n,) counter-clockwise loop, ``area``, ``le_radius``,
        ``code`` and the functions ``thickness``, ``camber``, ``camber_slope``,
        ``upper``, ``lower``.

    Raises
    ------
    InputError
        Malformed code, zero thickness, camber with p = 0, or n < 5.

    Examples
    --------
    >>> sec = naca4("NACA 2412", n=161)
    >>> sec.code, sec.x.shape
    ('2412', (161,))
    """
    return Section(code, n=n, closed_te=closed_te)
