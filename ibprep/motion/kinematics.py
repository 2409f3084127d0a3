"""Prescribed rigid motion of a body: plunge, pitch about a pivot, optional flapping stroke.

Frames and signs
----------------
Body frame: chord along +x from the leading edge at the origin, thickness along
+y, span along +z (a wing root at z = 0 unless the wing was built centred). The
world (grid) frame has the free stream along +x and +y up.

The motion is three rigid degrees of freedom sharing one frequency ``f``, each
an amplitude times a periodic unit waveform ``g`` of the phase ``tau = 2 pi f t``
(see :class:`Sine`, :class:`SmoothSquareWave`, :class:`Tabulated`):

* plunge  ``h(t) = h0 g_h(tau)`` along world +y (metres);
* pitch   ``theta(t) = theta0 g_theta(tau + phase)`` about the span axis through
  the pivot, nose-up positive (leading edge up, trailing edge down, flow along
  +x), i.e. a rotation about +z by ``-theta`` (radians);
* roll    ``phi(t) = phi0 g_phi(tau + roll_phase)``, an optional flapping stroke
  about the body x axis through the root point, positive when it raises a wing
  tip lying at +z (a rotation about +x by ``-phi``; radians).

Composition order (fixed): roll first, in the body frame, about the roll axis
through the root point ``q``; then pitch about the pivot ``p``; then the plunge
translation::

    x_world = R_pitch(theta) [ R_roll(phi) (x - q) + q - p ] + p + h e_y

Without a roll stroke this is the contract
``x_world = R(theta) (x - p) + p + (0, h, 0)``.

Velocities and accelerations are the analytic time derivatives of this map
(chain rule through the composition), never differences.

The non-dimensional numbers of a case come from :func:`flow_numbers`; cycle
maxima there are found by dense sampling refined by a bounded scalar optimiser
(Brent's method, :func:`scipy.optimize.minimize_scalar`).
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError

__all__ = [
    "Waveform",
    "Sine",
    "SmoothSquareWave",
    "Tabulated",
    "WaveformTable",
    "load_waveform_table",
    "Motion",
    "FlowNumbers",
    "flow_numbers",
]

_TWO_PI = 2.0 * math.pi

# A tabulated period closes if its last sample repeats the first to within this
# fraction of the column's range (values written with ~7 significant digits pass).
_PERIODIC_RTOL = 1e-6

# Samples per period before refinement of cycle extrema; refinement is local,
# so this only has to separate neighbouring peaks.
_CYCLE_SAMPLES = 1024

# Absolute time tolerance of the bounded refinement, as a fraction of the period;
# the value error it leaves at a smooth maximum is of order (1e-12)^2, far below 1e-9.
_REFINE_XATOL = 1e-12

# Peaks whose values agree to this relative amount are ties (e.g. the two halves of
# a symmetric stroke); the earliest in the period is reported.
_TIE_RTOL = 1e-9

# Sampled speeds are evaluated in time blocks holding at most this many points.
_BLOCK_POINTS = 2_000_000


# ----------------------------------------------------------------------------- helpers
def _finite_float(value, name: str, *, unit: str) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a number in {unit}, got {value!r}") from None
    if not math.isfinite(out):
        raise InputError(f"{name} must be finite (in {unit}), got {value!r}")
    return out


def _point3(value, name: str) -> tuple[float, float, float]:
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be 3 numbers (x, y, z) in metres, body frame, got {value!r}") from None
    if arr.shape != (3,):
        raise InputError(f"{name} must be 3 numbers (x, y, z) in metres, body frame, got {value!r}")
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name} must be finite, got {value!r}")
    return tuple(float(v) for v in arr)


def _times(t) -> tuple[np.ndarray, tuple[int, ...]]:
    """Flattened float times and the shape to restore (``()`` for a scalar)."""
    try:
        arr = np.asarray(t, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"time must be a number or an array of numbers in seconds, got {t!r}") from None
    if not np.all(np.isfinite(arr)):
        raise InputError("times must be finite; got NaN or infinity")
    return arr.reshape(-1), arr.shape


def _points(points) -> np.ndarray:
    try:
        arr = np.asarray(points, dtype=float)
    except (TypeError, ValueError):
        raise InputError("points must be an (m, 3) array of numbers in metres, body frame") from None
    if arr.ndim != 2 or arr.shape[1] != 3:
        raise InputError(
            f"points must be an (m, 3) array in metres, body frame, got shape {arr.shape}; "
            "use points.reshape(-1, 3) for a single point"
        )
    if not np.all(np.isfinite(arr)):
        raise InputError("points must be finite; got NaN or infinity")
    return arr


# ----------------------------------------------------------------------------- waveforms
class Waveform:
    """A periodic unit waveform ``g(tau)`` of the phase ``tau`` (radians, period 2 pi).

    Subclasses give ``g`` and its first two derivatives with respect to ``tau``;
    the motion scales them by an amplitude and by powers of ``2 pi f``. Every
    waveform has peak ``max |g| = 1`` over a period.
    """

    def evaluate(self, tau) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Values and derivatives at phases ``tau``.

        Parameters
        ----------
        tau : (n,) float — phase, radians.

        Returns
        -------
        g, dg, ddg : (n,) float — ``g``, ``dg/dtau``, ``d2g/dtau2``, dimensionless.
        """
        raise NotImplementedError


@dataclass(frozen=True)
class Sine(Waveform):
    """The sine ``g(tau) = sin(tau)``: the default waveform of every degree of freedom."""

    def evaluate(self, tau):
        """See :meth:`Waveform.evaluate`."""
        tau = np.asarray(tau, dtype=float)
        s = np.sin(tau)
        return s, np.cos(tau), -s


@dataclass(frozen=True)
class SmoothSquareWave(Waveform):
    """A sine flattened towards a square wave: ``g = tanh(beta sin tau) / tanh(beta)``.

    One shape parameter runs the family from the sine (``sharpness = 0``, exactly:
    that end value is evaluated as ``sin tau``, and the formula tends to it as
    ``g = sin tau (1 + beta^2 cos^2 tau / 3 + O(beta^4))``) to a near-square,
    trapezoid-like profile with short ramps and long dwells (``sharpness`` of 5
    or more). Every member is infinitely differentiable, so velocity and
    acceleration stay continuous; ``g(pi/2) = 1`` keeps the amplitude the peak.

    Parameters
    ----------
    sharpness : float — ``beta >= 0``, dimensionless.

    Notes
    -----
    The tanh-saturated sine is our own choice among such families (the
    non-sinusoidal flapping literature uses several; none is copied here). For
    large ``beta`` the ramp between the dwells (``|g| < 0.96``) lasts about
    ``4 / beta`` radians of phase, and the peak rate ``g'(0) = beta / tanh(beta)``
    is that many times the sine's.
    """

    sharpness: float = 0.0

    def __post_init__(self) -> None:
        b = _finite_float(self.sharpness, "SmoothSquareWave sharpness", unit="dimensionless units")
        if b < 0.0:
            raise InputError(
                f"SmoothSquareWave sharpness must be >= 0 (0 is the sine), got {self.sharpness!r}"
            )
        object.__setattr__(self, "sharpness", b)

    def evaluate(self, tau):
        """See :meth:`Waveform.evaluate`."""
        tau = np.asarray(tau, dtype=float)
        s, c = np.sin(tau), np.cos(tau)
        b = self.sharpness
        if b == 0.0:
            return s, c, -s
        th = np.tanh(b * s)
        sech2 = 1.0 - th * th
        scale = b / math.tanh(b)
        g = th / math.tanh(b)
        dg = scale * c * sech2
        ddg = scale * sech2 * (-s - 2.0 * b * c * c * th)
        return g, dg, ddg


@dataclass(frozen=True, eq=False)
class Tabulated(Waveform):
    """A waveform through samples of one period: a periodic cubic spline.

    The samples are normalised by the spline's peak ``max |g|`` (found from the
    roots of its derivative, not from the samples), so the waveform has peak 1
    and the caller's amplitude is that peak: to reproduce the samples in their
    own unit, give the motion ``amplitude = waveform.peak`` (as
    :meth:`Motion.from_table` does). Derivatives are the spline's own
    (``scipy.interpolate.CubicSpline(bc_type="periodic")``), so velocity is
    continuous and acceleration piecewise linear.

    Parameters
    ----------
    phase : (n,) float — radians, strictly increasing, ``phase[-1] - phase[0] = 2 pi``.
    values : (n,) float — any unit; ``values[-1]`` must repeat ``values[0]``.

    Attributes
    ----------
    peak : float — ``max |spline|`` over a period, in the unit of ``values``; 0 for
        an all-zero column (the waveform is then zero).
    """

    phase: np.ndarray
    values: np.ndarray
    peak: float = field(init=False)
    _spline: object = field(init=False, repr=False)

    def __post_init__(self) -> None:
        from scipy.interpolate import CubicSpline

        tau, vals = _checked_period_columns(
            np.asarray(self.phase), [("values", np.asarray(self.values))], "Tabulated waveform", period=_TWO_PI
        )
        vals = vals[0]
        spline = CubicSpline(tau, vals, bc_type="periodic")
        extrema = spline.derivative().roots(extrapolate=False)
        candidates = np.concatenate([vals, spline(extrema)]) if extrema.size else vals
        peak = float(np.max(np.abs(candidates)))
        if peak > 0.0:
            spline = CubicSpline(tau, vals / peak, bc_type="periodic")
        tau.setflags(write=False)
        vals.setflags(write=False)
        object.__setattr__(self, "phase", tau)
        object.__setattr__(self, "values", vals)
        object.__setattr__(self, "peak", peak)
        object.__setattr__(self, "_spline", spline)

    def evaluate(self, tau):
        """See :meth:`Waveform.evaluate`."""
        tau = np.asarray(tau, dtype=float)
        sp = self._spline
        return sp(tau), sp(tau, 1), sp(tau, 2)


def _checked_period_columns(t, columns, what: str, *, period=None, lines=None):
    """Validate a strictly increasing abscissa and periodic columns; return float copies.

    ``lines`` maps sample index to a source line for messages.
    """

    def where(i: int) -> str:
        return f" (line {lines[i]})" if lines is not None else f" (sample {i})"

    try:
        t = np.array(t, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{what}: the abscissa must be numbers") from None
    if t.ndim != 1 or t.size < 4:
        raise InputError(
            f"{what}: need at least 4 samples in a 1-D column (3 distinct plus the closing one), got shape {t.shape}"
        )
    bad = np.flatnonzero(~np.isfinite(t))
    if bad.size:
        raise InputError(f"{what}: time/phase is not finite at sample {bad[0]}{where(bad[0])}")
    step = np.diff(t)
    bad = np.flatnonzero(step <= 0.0)
    if bad.size:
        i = int(bad[0]) + 1
        raise InputError(
            f"{what}: time/phase must increase strictly, but sample {i}{where(i)} has {float(t[i])!r} after {float(t[i - 1])!r}; "
            "sort the samples and remove duplicates"
        )
    if period is not None and not math.isclose(t[-1] - t[0], period, rel_tol=1e-9):
        raise InputError(
            f"{what}: the samples must span exactly one period ({period!r}), got {float(t[-1] - t[0])!r}; "
            "end with the sample that closes the period"
        )
    out = []
    for name, col in columns:
        try:
            col = np.array(col, dtype=float)
        except (TypeError, ValueError):
            raise InputError(f"{what}: column {name} must be numbers") from None
        if col.shape != t.shape:
            raise InputError(f"{what}: column {name} has shape {col.shape}, expected {t.shape} like the time column")
        bad = np.flatnonzero(~np.isfinite(col))
        if bad.size:
            raise InputError(f"{what}: column {name} is not finite at sample {bad[0]}{where(bad[0])}")
        span = float(np.ptp(col))
        if abs(col[-1] - col[0]) > _PERIODIC_RTOL * max(span, np.finfo(float).tiny):
            n = t.size - 1
            raise InputError(
                f"{what}: column {name} is not periodic: the last sample{where(n)} is {float(col[-1])!r} but the first "
                f"is {float(col[0])!r}; the table must cover exactly one period and end with a row repeating the first"
            )
        col[-1] = col[0]
        out.append(col)
    return t, out


@dataclass(frozen=True, eq=False)
class WaveformTable:
    """One period of tabulated plunge and pitch: samples ``(t, h, theta)``.

    Parameters
    ----------
    t : (n,) float — seconds, strictly increasing; ``t[-1] - t[0]`` is the period.
    h : (n,) float — metres, plunge along world +y.
    theta : (n,) float — radians, pitch, nose-up positive.

    The last row closes the period: it repeats the first row's ``h`` and
    ``theta`` (to 1e-6 of each column's range; it is then set equal).

    Attributes
    ----------
    period : float — seconds.

    Raises
    ------
    InputError
        Fewer than 4 rows, non-finite values, times not strictly increasing, a
        column that does not close the period, mismatched lengths.
    """

    t: np.ndarray
    h: np.ndarray
    theta: np.ndarray
    period: float = field(init=False)

    def __post_init__(self) -> None:
        self._validate(None, "waveform table")

    def _validate(self, lines, what) -> None:
        t, (h, th) = _checked_period_columns(self.t, [("h", self.h), ("theta", self.theta)], what, lines=lines)
        for a in (t, h, th):
            a.setflags(write=False)
        object.__setattr__(self, "t", t)
        object.__setattr__(self, "h", h)
        object.__setattr__(self, "theta", th)
        object.__setattr__(self, "period", float(t[-1] - t[0]))

    def waveforms(self) -> tuple[Tabulated, Tabulated]:
        """The plunge and pitch waveforms on the phase ``tau = 2 pi t / period``."""
        tau = _TWO_PI * self.t / self.period  # the table's own time origin is kept
        tau[-1] = tau[0] + _TWO_PI
        return Tabulated(tau, self.h), Tabulated(tau, self.theta)


_TABLE_COLUMNS = {("t", "h", "theta"): 1.0, ("t", "h", "theta_deg"): math.pi / 180.0}


def load_waveform_table(path) -> WaveformTable:
    """Read one period of tabulated plunge and pitch from a CSV file.

    Each data row is ``t, h, theta`` (seconds, metres, radians). An optional
    header row names the columns ``t,h,theta`` or ``t,h,theta_deg`` (pitch in
    degrees). Blank lines and lines starting with ``#`` are skipped. The last row
    closes the period (repeats the first row's ``h`` and ``theta``).

    Parameters
    ----------
    path : str or path-like — the CSV file.

    Returns
    -------
    WaveformTable

    Raises
    ------
    InputError
        A missing or unreadable file, a row that is not three numbers, an unknown
        header, or a table that is not one increasing, closed period; the message
        names the file and line.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read waveform table {str(path)!r}: {exc.strerror or exc}") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise InputError(f"{path}, line {line}: not UTF-8 text; a waveform table is a CSV of numbers t, h, theta") from None
    if "\x00" in text:
        raise InputError(f"{path}: holds NUL bytes, so it is a binary file, not a CSV of numbers t, h, theta")
    rows, lines = [], []
    scale = 1.0
    for lineno, row in enumerate(csv.reader(text.splitlines()), start=1):
        cells = [c.strip() for c in row]
        if not cells or not any(cells) or cells[0].startswith("#"):
            continue
        if len(cells) != 3:
            raise InputError(
                f"{path}, line {lineno}: expected 3 comma-separated values (t, h, theta), found {len(cells)}"
            )
        try:
            rows.append([float(c) for c in cells])
        except ValueError:
            key = tuple(c.lower() for c in cells)
            if not rows and not lines and key in _TABLE_COLUMNS:
                scale = _TABLE_COLUMNS[key]
                lines.append(None)  # header seen; no data yet
                continue
            bad = next(k for k, c in enumerate(cells) if not _is_number(c))
            raise InputError(
                f"{path}, line {lineno}: value {bad + 1} is not a number; expected numbers t, h, theta "
                f"(or a first-row header 't,h,theta' or 't,h,theta_deg')"
            ) from None
        lines.append(lineno)
    lines = [ln for ln in lines if ln is not None]
    if not rows:
        raise InputError(f"{path}: no data rows; expected lines 't, h, theta' covering one period")
    data = np.array(rows, dtype=float)
    table = object.__new__(WaveformTable)
    object.__setattr__(table, "t", data[:, 0])
    object.__setattr__(table, "h", data[:, 1])
    object.__setattr__(table, "theta", data[:, 2] * scale)
    table._validate(lines, f"{path}")
    return table


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


# ----------------------------------------------------------------------------- rotations
def _rot_pitch(a: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """R = rotation about +z by -a, and dR/da, d2R/da2; each (n, 3, 3)."""
    c, s = np.cos(a), np.sin(a)
    z, o = np.zeros_like(a), np.ones_like(a)
    r = np.stack([c, s, z, -s, c, z, z, z, o], axis=-1).reshape(-1, 3, 3)
    d1 = np.stack([-s, c, z, -c, -s, z, z, z, z], axis=-1).reshape(-1, 3, 3)
    d2 = np.stack([-c, -s, z, s, -c, z, z, z, z], axis=-1).reshape(-1, 3, 3)
    return r, d1, d2


def _rot_roll(a: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """R = rotation about +x by -a (raises +z towards +y), dR/da, d2R/da2; each (n, 3, 3)."""
    c, s = np.cos(a), np.sin(a)
    z, o = np.zeros_like(a), np.ones_like(a)
    r = np.stack([o, z, z, z, c, s, z, -s, c], axis=-1).reshape(-1, 3, 3)
    d1 = np.stack([z, z, z, z, -s, c, z, -c, -s], axis=-1).reshape(-1, 3, 3)
    d2 = np.stack([z, z, z, z, -c, -s, z, s, -c], axis=-1).reshape(-1, 3, 3)
    return r, d1, d2


# ----------------------------------------------------------------------------- motion
@dataclass(frozen=True, kw_only=True)
class Motion:
    """Prescribed periodic rigid motion: plunge, pitch about a pivot, optional roll stroke.

    ``h(t) = h0 g_h(2 pi f t)``, ``theta(t) = theta0 g_theta(2 pi f t + phase)``,
    ``phi(t) = phi0 g_phi(2 pi f t + roll_phase)``; with the default sine
    waveforms ``h = h0 sin(2 pi f t)`` and ``theta = theta0 sin(2 pi f t + phase)``.
    Body points map to the world as (roll first, then pitch, then plunge)::

        x_world = R_pitch(theta) [R_roll(phi) (x - roll_root) + roll_root - pivot] + pivot + h e_y

    with ``R_pitch(theta)`` the rotation about +z by ``-theta`` (nose-up pitch
    positive: leading edge up, trailing edge down for flow along +x) and
    ``R_roll(phi)`` the rotation about +x by ``-phi`` (positive roll raises a
    wing tip lying at +z). Body frame: chord along +x from the leading edge at
    the origin, thickness +y, span +z.

    Parameters
    ----------
    frequency : float — hertz, > 0, shared by every degree of freedom.
    plunge_amplitude : float — metres, >= 0 (``h0``, the peak of ``|h|``).
    pitch_amplitude : float — radians, in [0, pi/2) (``theta0``).
    phase : float — radians; pitch phase lead over plunge (pi/2: pitch leads by a quarter period).
    pivot : (3,) float — metres, body frame; the pitch axis passes through it along z.
    plunge_waveform, pitch_waveform, roll_waveform : Waveform — default :class:`Sine`.
    roll_amplitude : float — radians, in [0, pi) (``phi0``); 0 (default) means no stroke.
    roll_phase : float — radians; roll phase lead over plunge.
    roll_root : (3,) float — metres, body frame; the roll axis passes through it along x.

    Raises
    ------
    InputError
        A non-positive or non-finite frequency, a negative or non-finite
        amplitude, a pitch amplitude of 90 degrees or more, a pivot or root that
        is not 3 finite numbers, or a waveform that is not a :class:`Waveform`.
    """

    frequency: float
    plunge_amplitude: float = 0.0
    pitch_amplitude: float = 0.0
    phase: float = 0.0
    pivot: tuple[float, float, float] = (0.0, 0.0, 0.0)
    plunge_waveform: Waveform = field(default_factory=Sine)
    pitch_waveform: Waveform = field(default_factory=Sine)
    roll_amplitude: float = 0.0
    roll_phase: float = 0.0
    roll_root: tuple[float, float, float] = (0.0, 0.0, 0.0)
    roll_waveform: Waveform = field(default_factory=Sine)

    def __post_init__(self) -> None:
        f = _finite_float(self.frequency, "motion frequency", unit="hertz")
        if f <= 0.0:
            raise InputError(f"motion frequency must be > 0 Hz, got {self.frequency!r}")
        h0 = _finite_float(self.plunge_amplitude, "plunge_amplitude", unit="metres")
        if h0 < 0.0:
            raise InputError(
                f"plunge_amplitude must be >= 0 m, got {self.plunge_amplitude!r}; express a sign change as a phase"
            )
        th0 = _finite_float(self.pitch_amplitude, "pitch_amplitude", unit="radians")
        if not 0.0 <= th0 < 0.5 * math.pi:
            raise InputError(
                f"pitch_amplitude must be in [0, pi/2) radians (below 90 degrees), got {self.pitch_amplitude!r} "
                f"({math.degrees(th0):.6g} deg); give radians, and a sign change as a phase"
            )
        ph0 = _finite_float(self.roll_amplitude, "roll_amplitude", unit="radians")
        if not 0.0 <= ph0 < math.pi:
            raise InputError(
                f"roll_amplitude must be in [0, pi) radians, got {self.roll_amplitude!r} ({math.degrees(ph0):.6g} deg)"
            )
        phase = _finite_float(self.phase, "phase", unit="radians")
        roll_phase = _finite_float(self.roll_phase, "roll_phase", unit="radians")
        pivot = _point3(self.pivot, "pivot")
        root = _point3(self.roll_root, "roll_root")
        for name in ("plunge_waveform", "pitch_waveform", "roll_waveform"):
            w = getattr(self, name)
            if not isinstance(w, Waveform):
                raise InputError(
                    f"{name} must be a Waveform (Sine(), SmoothSquareWave(...), Tabulated(...)), got {w!r}"
                )
        for name, value in (
            ("frequency", f),
            ("plunge_amplitude", h0),
            ("pitch_amplitude", th0),
            ("roll_amplitude", ph0),
            ("phase", phase),
            ("roll_phase", roll_phase),
            ("pivot", pivot),
            ("roll_root", root),
        ):
            object.__setattr__(self, name, value)

    # ------------------------------------------------------------ constructors
    @classmethod
    def from_table(cls, table: WaveformTable, *, pivot=(0.0, 0.0, 0.0), **roll) -> "Motion":
        """Motion following a tabulated period of plunge and pitch.

        The frequency is ``1 / table.period``; each amplitude is the peak ``|.|``
        of its spline; the phase is 0 (the table carries the timing, with its own
        time origin). ``roll`` takes the ``roll_*`` keywords of :class:`Motion`.

        Parameters
        ----------
        table : WaveformTable — from :func:`load_waveform_table` or built from arrays.
        pivot : (3,) float — metres, body frame.
        """
        if not isinstance(table, WaveformTable):
            raise InputError(f"Motion.from_table needs a WaveformTable, got {type(table).__name__}")
        bad = set(roll) - {"roll_amplitude", "roll_phase", "roll_root", "roll_waveform"}
        if bad:
            raise InputError(f"Motion.from_table takes only roll_* keywords besides pivot, got {sorted(bad)}")
        wh, wth = table.waveforms()
        if wth.peak >= 0.5 * math.pi:
            raise InputError(
                f"tabulated pitch reaches {math.degrees(wth.peak):.6g} deg; it must stay below 90 deg "
                "(theta is in radians unless the header says theta_deg)"
            )
        return cls(
            frequency=1.0 / table.period,
            plunge_amplitude=wh.peak,
            pitch_amplitude=wth.peak,
            phase=0.0,
            pivot=pivot,
            plunge_waveform=wh,
            pitch_waveform=wth,
            **roll,
        )

    # ------------------------------------------------------------ scalars
    @property
    def period(self) -> float:
        """Period of the motion, seconds."""
        return 1.0 / self.frequency

    @property
    def angular_frequency(self) -> float:
        """``omega = 2 pi f``, radians per second."""
        return _TWO_PI * self.frequency

    # ------------------------------------------------------------ degrees of freedom
    def _dof(self, tt: np.ndarray):
        """h, theta, phi and their first and second time derivatives at flat times."""
        w = self.angular_frequency
        tau = w * tt
        out = []
        for amp, wave, ph in (
            (self.plunge_amplitude, self.plunge_waveform, 0.0),
            (self.pitch_amplitude, self.pitch_waveform, self.phase),
            (self.roll_amplitude, self.roll_waveform, self.roll_phase),
        ):
            if amp == 0.0:
                z = np.zeros_like(tt)
                out.append((z, z, z))
                continue
            g, dg, ddg = wave.evaluate(tau + ph)
            out.append((amp * g, amp * w * dg, amp * w * w * ddg))
        return out

    def plunge(self, t):
        """Plunge ``h(t)``: metres, shape of ``t``. ``t`` : float or array — seconds."""
        tt, shape = _times(t)
        return self._dof(tt)[0][0].reshape(shape)

    def pitch(self, t):
        """Pitch ``theta(t)``: radians, nose-up positive, shape of ``t``. ``t`` : float or array — seconds."""
        tt, shape = _times(t)
        return self._dof(tt)[1][0].reshape(shape)

    def roll(self, t):
        """Roll stroke ``phi(t)``: radians, positive raises a +z tip, shape of ``t``. ``t`` : float or array — seconds."""
        tt, shape = _times(t)
        return self._dof(tt)[2][0].reshape(shape)

    def effective_angle(self, t, speed) -> np.ndarray:
        """Quasi-steady effective angle of attack ``alpha_eff = theta(t) - atan(h_dot(t) / U)``.

        Nose-up pitch and upward plunge positive, so moving up lowers the angle.
        The roll stroke and the pitch-rate (pivot offset) contribution are ignored.

        Parameters
        ----------
        t : float or (n,) float — seconds.
        speed : float — metres per second, > 0; free stream ``U`` along +x.

        Returns
        -------
        float array of the shape of ``t`` — radians.
        """
        u = _finite_float(speed, "speed", unit="metres per second")
        if u <= 0.0:
            raise InputError(f"speed must be > 0, got {speed!r}")
        tt, shape = _times(t)
        (_, hd, _), (th, _, _), _ = self._dof(tt)
        return (th - np.arctan(hd / u)).reshape(shape)

    def _kinematics(self, tt: np.ndarray, order: int):
        """Rotation R, offset d (x_world = R (x - q) + d) and their derivatives up to ``order``.

        Returns lists ``[R, dR, ddR]`` (each (n, 3, 3)) and ``[d, dd, ddd]`` (each (n, 3)),
        truncated to ``order + 1`` entries.
        """
        (h, hd, hdd), (th, thd, thdd), (ph, phd, phdd) = self._dof(tt)
        rp, rp1, rp2 = _rot_pitch(th)
        q = np.asarray(self.roll_root)
        qp = q - np.asarray(self.pivot)  # q - p
        ey = np.array([0.0, 1.0, 0.0])
        base = np.asarray(self.pivot)
        if self.roll_amplitude == 0.0:
            rr = np.broadcast_to(np.eye(3), rp.shape)
            rot = [rp, rp1 * thd[:, None, None], rp1 * thdd[:, None, None] + rp2 * (thd * thd)[:, None, None]]
        else:
            rr, rr1, rr2 = _rot_roll(ph)
            rot = [
                rp @ rr,
                (rp1 @ rr) * thd[:, None, None] + (rp @ rr1) * phd[:, None, None],
                (rp1 @ rr) * thdd[:, None, None]
                + (rp2 @ rr) * (thd * thd)[:, None, None]
                + 2.0 * (rp1 @ rr1) * (thd * phd)[:, None, None]
                + (rp @ rr2) * (phd * phd)[:, None, None]
                + (rp @ rr1) * phdd[:, None, None],
            ]
        rpq = [rp @ qp, rp1 @ qp, rp2 @ qp]
        off = [
            rpq[0] + base + h[:, None] * ey,
            rpq[1] * thd[:, None] + hd[:, None] * ey,
            rpq[1] * thdd[:, None] + rpq[2] * (thd * thd)[:, None] + hdd[:, None] * ey,
        ]
        return rot[: order + 1], off[: order + 1]

    # ------------------------------------------------------------ public kinematics
    def pose(self, t) -> np.ndarray:
        """Homogeneous body-to-world transforms at times ``t``.

        Parameters
        ----------
        t : float or (n,) float — seconds.

        Returns
        -------
        (4, 4) float for a scalar ``t``, else (n, 4, 4) float (``t.shape + (4, 4)``):
        ``x_world = T[:3, :3] @ x_body + T[:3, 3]``, metres.
        """
        tt, shape = _times(t)
        (rot,), (off,) = self._kinematics(tt, 0)
        q = np.asarray(self.roll_root)
        out = np.zeros((tt.size, 4, 4))
        out[:, :3, :3] = rot
        out[:, :3, 3] = off - rot @ q
        out[:, 3, 3] = 1.0
        return out.reshape(shape + (4, 4))

    def transform(self, points, t) -> np.ndarray:
        """World positions of body-frame points.

        Parameters
        ----------
        points : (m, 3) float — metres, body frame.
        t : float or (n,) float — seconds.

        Returns
        -------
        (m, 3) float for a scalar ``t``, else (n, m, 3) float — metres, world frame.
        """
        return self._apply(points, t, 0)

    def velocity(self, points, t) -> np.ndarray:
        """World (grid-frame) velocities of body-frame points, from the analytic derivative of the pose.

        Parameters
        ----------
        points : (m, 3) float — metres, body frame.
        t : float or (n,) float — seconds.

        Returns
        -------
        (m, 3) float for a scalar ``t``, else (n, m, 3) float — metres per second,
        world frame (subtract the free stream for the velocity relative to it).
        """
        return self._apply(points, t, 1)

    def acceleration(self, points, t) -> np.ndarray:
        """World accelerations of body-frame points (analytic second derivative of the pose).

        Parameters
        ----------
        points : (m, 3) float — metres, body frame.
        t : float or (n,) float — seconds.

        Returns
        -------
        (m, 3) float for a scalar ``t``, else (n, m, 3) float — metres per second squared.
        """
        return self._apply(points, t, 2)

    def _apply(self, points, t, order: int) -> np.ndarray:
        pts = _points(points)
        tt, shape = _times(t)
        rot, off = self._kinematics(tt, order)
        a = pts - np.asarray(self.roll_root)
        out = a @ rot[order].transpose(0, 2, 1) + off[order][:, None, :]  # (n, m, 3), batched matmul
        return out.reshape(shape + pts.shape)

    def angular_velocity(self, t) -> np.ndarray:
        """World-frame angular velocity ``Omega`` of the body.

        ``Omega = -theta_dot e_z + R_pitch(theta) (-phi_dot e_x)``; any body point
        moves with ``v = v_ref + Omega x (x_world - x_ref_world)``.

        Parameters
        ----------
        t : float or (n,) float — seconds.

        Returns
        -------
        (3,) float for a scalar ``t``, else (n, 3) float — radians per second.
        """
        tt, shape = _times(t)
        _, (th, thd, _), (_, phd, _) = self._dof(tt)
        rp = _rot_pitch(th)[0]
        om = rp[:, :, 0] * (-phd)[:, None]
        om[:, 2] -= thd
        return om.reshape(shape + (3,))

    # ------------------------------------------------------------ cycle extrema
    def speed_extrema(self, points, *, free_stream=(0.0, 0.0, 0.0), samples: int = _CYCLE_SAMPLES):
        """Local maxima over one period of the largest speed among body points.

        The speed envelope ``S(t) = max_j |v_j(t) - u|`` is sampled at ``samples``
        instants of ``[0, T)``; each sampled local maximum is refined by bounded
        Brent minimisation of ``-S`` on its two neighbouring intervals.

        Parameters
        ----------
        points : (m, 3) float — metres, body frame.
        free_stream : (3,) float — metres per second, world frame; 0 gives grid-frame
            speeds, ``(U, 0, 0)`` speeds relative to the free stream.
        samples : int — sampling density per period (>= 16).

        Returns
        -------
        times : (k,) float — seconds in ``[0, T)``, ascending.
        speeds : (k,) float — metres per second at those instants.
        """
        pts = _points(points)
        u = np.asarray(_point3(free_stream, "free_stream"))
        block = max(1, _BLOCK_POINTS // len(pts)) if len(pts) else 1

        def envelope(tt):
            tt = np.atleast_1d(tt)
            if len(pts) == 0:
                return np.zeros(tt.shape)
            out = np.empty(tt.shape)
            for i in range(0, tt.size, block):  # time blocks bound memory, not a per-time loop
                v = self.velocity(pts, tt[i : i + block]) - u
                out[i : i + block] = np.sqrt(np.einsum("nmi,nmi->nm", v, v).max(axis=1))
            return out

        return _local_maxima(envelope, self.period, samples)

    def peak_speed_times(self, points, *, free_stream=(0.0, 0.0, 0.0)) -> np.ndarray:
        """Instants within one period at which the largest body speed peaks.

        These are the instants a pre-flight check should examine (body Courant
        number, surface travel per step). See :meth:`speed_extrema`, which also
        returns the speeds.

        Parameters
        ----------
        points : (m, 3) float — metres, body frame (surface points or vertices).
        free_stream : (3,) float — metres per second; 0 for grid-frame speed.

        Returns
        -------
        (k,) float — seconds in ``[0, T)``, sorted by decreasing peak speed
        (ties, e.g. the two halves of a symmetric stroke, by time).
        """
        times, speeds = self.speed_extrema(points, free_stream=free_stream)
        order = np.lexsort((times, -np.round(speeds / max(speeds.max(initial=0.0), 1e-300) / _TIE_RTOL)))
        return times[order]


def _local_maxima(fun, period: float, samples: int):
    """Refined local maxima of a T-periodic function of time; returns (times, values) ascending in time."""
    from scipy.optimize import minimize_scalar

    if int(samples) < 16:
        raise InputError(f"samples must be >= 16 per period, got {samples!r}")
    n = int(samples)
    dt = period / n
    ts = np.arange(n) * dt
    vals = fun(ts)
    left, right = np.roll(vals, 1), np.roll(vals, -1)
    idx = np.flatnonzero((vals >= left) & (vals > right))
    if idx.size == 0:  # constant function
        return np.array([0.0]), vals[:1].copy()
    times, peaks = [], []
    for i in idx:  # one bounded refinement per peak (a handful per period)
        res = minimize_scalar(
            lambda s: -float(fun(np.array([s]))[0]),
            bounds=(ts[i] - dt, ts[i] + dt),
            method="bounded",
            options={"xatol": _REFINE_XATOL * period, "maxiter": 500},
        )
        t_best, v_best = (float(res.x), -float(res.fun)) if -res.fun >= vals[i] else (float(ts[i]), float(vals[i]))
        t_best = t_best % period
        if period - t_best <= 1e-9 * period:
            t_best = 0.0
        times.append(t_best)
        peaks.append(v_best)
    times, peaks = np.array(times), np.array(peaks)
    order = np.argsort(times)
    return times[order], peaks[order]


def _cycle_max(fun, period: float, samples: int = _CYCLE_SAMPLES) -> tuple[float, float]:
    """Largest value of a T-periodic function over a cycle and the earliest time it occurs."""
    times, vals = _local_maxima(fun, period, samples)
    best = vals.max()
    tie = vals >= best - _TIE_RTOL * abs(best)
    return float(best), float(times[tie].min())


# ----------------------------------------------------------------------------- numbers
@dataclass(frozen=True)
class FlowNumbers:
    """Non-dimensional numbers of a moving-body case (see :func:`flow_numbers`).

    Lengths are scaled by the chord ``c``, speeds by the free stream ``U`` along
    +x, times by the period; angles in radians, phases as ``omega t`` in
    ``[0, 2 pi)`` radians.

    Attributes
    ----------
    reynolds : float — ``Re = U c / nu``.
    frequency_ratio : float — ``f* = f c / U`` (no 2 pi).
    k_chord : float — reduced frequency on the chord, ``k = 2 pi f c / U = omega c / U``.
    k_half_chord : float — reduced frequency on the half chord, ``pi f c / U = omega (c/2) / U``
        (the unsteady-aerofoil-theory convention).
    plunge_ratio : float — ``h = h0 / c``.
    kh : float — ``k_chord * h = omega h0 / U``, peak plunge speed over ``U`` for a sine.
    strouhal : float — ``St = 2 f h0 / U`` (peak-to-peak plunge ``2 h0``).
    strouhal_te : float — ``f A_TE / U`` with ``A_TE`` the peak-to-peak vertical (world y)
        excursion of the trailing-edge point over the cycle.
    alpha_nominal : float — ``theta0 - atan(omega h0 / U)``: the effective angle at
        mid-stroke for sine motion with pitch leading by 90 degrees.
    alpha_max : float — ``max |alpha_eff(t)|`` over the cycle, with
        ``alpha_eff = theta(t) - atan(h_dot(t) / U)`` (quasi-steady; the roll stroke and
        the pitch-rate term are ignored).
    alpha_max_phase : float — ``omega t`` where ``alpha_max`` first occurs in the period.
    feathering : float — ``chi = theta0 / atan(omega h0 / U)`` (the form with the
        arctangent; > 1 is the power-extraction side); ``inf`` when ``h0 = 0``.
    feathering_linear : float — ``theta0 U / (omega h0)``, the small-angle form
        (``theta0 / kh``); ``inf`` when ``h0 = 0``.
    max_te_speed : float — ``max |v_TE| / U`` over the cycle, grid frame.
    max_te_speed_phase : float — ``omega t`` where it first occurs.
    max_te_speed_relative : float — ``max |v_TE - U e_x| / U``, relative to the free stream.
    max_surface_speed : float or None — ``max_j |v_j| / U`` over the given surface points
        and the cycle, grid frame; None when no points were given.
    max_surface_speed_relative : float or None — the same relative to the free stream.
    """

    reynolds: float
    frequency_ratio: float
    k_chord: float
    k_half_chord: float
    plunge_ratio: float
    kh: float
    strouhal: float
    strouhal_te: float
    alpha_nominal: float
    alpha_max: float
    alpha_max_phase: float
    feathering: float
    feathering_linear: float
    max_te_speed: float
    max_te_speed_phase: float
    max_te_speed_relative: float
    max_surface_speed: float | None = None
    max_surface_speed_relative: float | None = None


def flow_numbers(motion: Motion, chord, speed, viscosity, *, te_point=None, surface_points=None) -> FlowNumbers:
    """The non-dimensional numbers of a case: Reynolds, reduced frequencies, Strouhal, angles, speeds.

    Parameters
    ----------
    motion : Motion
    chord : float — metres, > 0.
    speed : float — metres per second, > 0; free stream ``U`` along +x.
    viscosity : float — square metres per second, > 0; kinematic viscosity ``nu``.
    te_point : (3,) float, optional — metres, body frame; trailing-edge point, default
        ``(chord, 0, 0)`` (leading edge at the origin).
    surface_points : (m, 3) float, optional — metres, body frame; points over which the
        maximum body-surface speed is taken.

    Returns
    -------
    FlowNumbers — the conventions are listed there.

    Notes
    -----
    Cycle maxima are found by sampling 1024 instants per period and refining
    every sampled local maximum with bounded Brent minimisation
    (:func:`scipy.optimize.minimize_scalar`), which locates smooth maxima to
    ~1e-12 of the period and gives the values to ~1e-12 relative. Over many
    surface points the envelope ``max_j |v_j|`` is refined, whose peaks are the
    smooth peaks of single points.

    Raises
    ------
    InputError
        A non-positive or non-finite chord, speed or viscosity, or malformed points.
    """
    if not isinstance(motion, Motion):
        raise InputError(f"flow_numbers needs a Motion, got {type(motion).__name__}")
    c = _finite_float(chord, "chord", unit="metres")
    u = _finite_float(speed, "speed", unit="metres per second")
    nu = _finite_float(viscosity, "viscosity", unit="square metres per second")
    for name, value, raw in (("chord", c, chord), ("speed", u, speed), ("viscosity", nu, viscosity)):
        if value <= 0.0:
            raise InputError(f"{name} must be > 0, got {raw!r}")
    te = np.array([c, 0.0, 0.0]) if te_point is None else np.asarray(_point3(te_point, "te_point"))
    te = te.reshape(1, 3)
    f, w, T = motion.frequency, motion.angular_frequency, motion.period
    h0, th0 = motion.plunge_amplitude, motion.pitch_amplitude

    def alpha_abs(tt):
        return np.abs(motion.effective_angle(np.atleast_1d(tt), u))

    alpha_max, t_alpha = _cycle_max(alpha_abs, T)

    def te_y(sign):
        return lambda tt: sign * motion.transform(te, np.atleast_1d(tt))[:, 0, 1]

    y_hi, _ = _cycle_max(te_y(1.0), T)
    y_lo, _ = _cycle_max(te_y(-1.0), T)

    def speed_of(points, stream):
        return lambda tt: np.linalg.norm(motion.velocity(points, np.atleast_1d(tt)) - stream, axis=-1).max(axis=1)

    zero, free = np.zeros(3), np.array([u, 0.0, 0.0])
    v_te, t_te = _cycle_max(speed_of(te, zero), T)
    v_te_rel, _ = _cycle_max(speed_of(te, free), T)
    surf = surf_rel = None
    if surface_points is not None:
        pts = _points(surface_points)
        if len(pts):
            surf = float(motion.speed_extrema(pts)[1].max()) / u
            surf_rel = float(motion.speed_extrema(pts, free_stream=free)[1].max()) / u

    heave_angle = math.atan(w * h0 / u)
    if h0 == 0.0:
        chi = chi_lin = math.inf if th0 > 0.0 else math.nan
    else:
        chi, chi_lin = th0 / heave_angle, th0 * u / (w * h0)
    return FlowNumbers(
        reynolds=u * c / nu,
        frequency_ratio=f * c / u,
        k_chord=w * c / u,
        k_half_chord=math.pi * f * c / u,
        plunge_ratio=h0 / c,
        kh=w * h0 / u,
        strouhal=2.0 * f * h0 / u,
        strouhal_te=f * (y_hi + y_lo) / u,
        alpha_nominal=th0 - heave_angle,
        alpha_max=alpha_max,
        alpha_max_phase=(w * t_alpha) % _TWO_PI,
        feathering=chi,
        feathering_linear=chi_lin,
        max_te_speed=v_te / u,
        max_te_speed_phase=(w * t_te) % _TWO_PI,
        max_te_speed_relative=v_te_rel / u,
        max_surface_speed=surf,
        max_surface_speed_relative=surf_rel,
    )
