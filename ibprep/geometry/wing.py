"""Finite-span wings from a NACA section: taper, sweep, twist, flat or rounded ends.

Body frame (DESIGN.md §3): chord along +x from the leading edge of the root
section at the origin, thickness along +y, span along +z. The wing occupies
``0 <= z <= span`` (root end at z = 0), or ``-span/2 <= z <= span/2`` with
``centred=True``. ``span`` is the tip-to-tip length, rounded ends included.

Construction
------------
The wing is a straight part between two end sections plus one cap at each end.
Along the straight part the section is scaled linearly from the root chord to
``taper * chord``, its leading edge is moved aft by ``tan(sweep)`` per unit
span, and it is pitched linearly from 0 at the root section to ``twist`` at the
tip section about its quarter-chord point (nose-up positive, as the pitch angle
of DESIGN.md §3; washout is a negative ``twist``).

Both surfaces use the same camber-line stations ``x_i``, graded so the spacing
is smallest at the leading edge (where the nose radius needs it) but never more
than about eight times finer than mid-chord: then a uniform spanwise spacing
between the finest and coarsest chordwise spacing keeps every triangle's
aspect ratio small.

A flat end is the planar end section, triangulated across the thickness at
each station; ahead of x = 2 r_LE it is a fan from a point at x = r_LE on the
camber line, so the round nose is not cut into slivers. A rounded end is half a body of revolution of the end section:
at each station, a half circle of radius y_t(x_i) c centred on the camber line,
in the plane normal to the camber line, bulging outward along the span. For a
symmetric section each rounded end adds (pi/2) c^3 int y_t(x)^2 dx of volume
(for a cambered one, int along the camber-line arc length).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from .naca import Section, cosine_stations, naca4
from .surface import mesh_from_arrays

__all__ = ["WingLayout", "make_wing", "wing_stations", "cap_volume"]

# Ratio of mid-chord to leading-edge spacing of the chordwise stations.
_LE_GRADING = 8.0
# Fine cosine-spaced stations used to measure arc length and turning of a section.
_FINE_SEGMENTS = 4000
# Default chordwise segments per surface when neither n_chord nor faces is given.
_DEFAULT_N_CHORD = 32
_TIPS = ("flat", "round")
# Gauss-Legendre points per piece for the cap volume (y_t^2 dx is a degree-19 polynomial in sqrt(x)).
_CAP_GAUSS_POINTS = 48
_MAX_SWEEP = math.radians(75.0)
_MAX_TWIST = math.radians(60.0)
# Sections whose half-thickness reaches this fraction of the camber line's radius of
# curvature are refused: the discrete end rings start to cross just below 1 (0.98 seen).
_MAX_FOLD_RATIO = 0.9


def wing_stations(section: Section, segments: int) -> np.ndarray:
    """Camber-line stations for a wing's chordwise resolution.

    Parameters
    ----------
    section : Section — the section shape (its functions are used, not its loop).
    segments : int — chordwise intervals per surface.

    Returns
    -------
    (segments + 1,) float — fraction of chord, 0 to 1, increasing.

    Notes
    -----
    Equidistributes arc length weighted by a density ``w`` averaged over both
    surfaces: ``w = min(8, max(1 + 7 r_LE kappa, h / (3 y_t)))``, with ``kappa``
    the curvature and ``h`` the unweighted spacing. The first term makes the
    spacing where the curvature is 1/r_LE 1/8 of the flat-part spacing; the
    second keeps the spacing within about three half-thicknesses where the
    section is thin (near the trailing edge), so the thin tube of a rounded end
    there is not cut into needles. The cap at 8 bounds the spacing ratio.
    """
    k = int(segments)
    xf = cosine_stations(_FINE_SEGMENTS)
    lam = (_LE_GRADING - 1.0) * section.le_radius
    xm = 0.5 * (xf[1:] + xf[:-1])
    yt = section.thickness(xm)
    surfaces = []
    for xs, ys in (section.upper(xf), section.lower(xf)):
        dx, dy = np.diff(xs), np.diff(ys)
        ds = np.hypot(dx, dy)
        ang = np.unwrap(np.arctan2(dy, dx))
        turn = np.abs(np.diff(ang))
        seg_turn = np.zeros_like(ds)
        seg_turn[:-1] += 0.5 * turn
        seg_turn[1:] += 0.5 * turn
        surfaces.append((ds, seg_turn / ds))
    h_plain = 0.5 * sum(ds.sum() for ds, _ in surfaces) / k
    with np.errstate(divide="ignore"):
        thin = np.where(yt > 0, h_plain / (3.0 * np.where(yt > 0, yt, 1.0)), np.inf)
    cost = np.zeros(len(xf) - 1)
    for ds, kappa in surfaces:
        cost += 0.5 * ds * np.minimum(_LE_GRADING, np.maximum(1.0 + lam * kappa, thin))
    cum = np.concatenate([[0.0], np.cumsum(cost)])
    x = np.interp(np.linspace(0.0, cum[-1], k + 1), cum, xf)
    x[0], x[-1] = 0.0, 1.0
    return x


def cap_volume(section: Section, chord: float) -> float:
    """Volume of one rounded end: (pi/2) c^3 int y_t^2 ds along the camber line, m^3.

    Parameters
    ----------
    section : Section — the end section.
    chord : float — metres; the end section's chord.

    Notes
    -----
    Exact for the continuous shape (the half-disc sweep's curvature term
    integrates to zero over the half circle). Evaluated by Gauss-Legendre
    quadrature in u = sqrt(x), where y_t is a polynomial: exact to round-off for
    a symmetric section; for a cambered one each side of x = p is integrated
    separately (the camber line's curvature jumps there).
    """
    u, w = np.polynomial.legendre.leggauss(_CAP_GAUSS_POINTS)
    pieces = [(0.0, 1.0)] if section.m == 0.0 else [(0.0, math.sqrt(section.p)), (math.sqrt(section.p), 1.0)]
    total = 0.0
    for a, b in pieces:
        uu = 0.5 * (b - a) * u + 0.5 * (b + a)
        x = np.clip(uu * uu, 0.0, 1.0)
        f = section.thickness(x) ** 2 * np.sqrt(1.0 + section.camber_slope(x) ** 2) * 2.0 * uu
        total += 0.5 * (b - a) * float(np.dot(w, f))
    return 0.5 * np.pi * chord**3 * total


@dataclass(frozen=True)
class WingLayout:
    """Resolved resolution of a wing (stored in ``mesh.metadata['wing']``).

    Attributes
    ----------
    n_chord : int — chordwise intervals per surface.
    n_span : int — spanwise intervals along the straight part.
    n_tip : int — intervals around the half circle (round) or across the thickness
        (flat) at the thickest station of an end.
    stations : (n_chord + 1,) float — camber-line stations, fraction of chord.
    loop : (m, 2) float — the section outline used (unit chord, counter-clockwise).
    z_root, z_tip : float — metres; span positions of the straight part's end sections.
    """

    n_chord: int
    n_span: int
    n_tip: int
    stations: np.ndarray
    loop: np.ndarray
    z_root: float
    z_tip: float


def _positive(name: str, value, *, allow_zero=False) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        raise InputError(f"{name} must be a positive finite number, got {value!r}")
    return v


def _count(name: str, value, minimum: int) -> int | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise InputError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def _zip_rings(ring_vertices, counts, reverse: bool) -> np.ndarray:
    """Triangles joining consecutive rings of a cap.

    ``ring_vertices`` is the flat list of global vertex ids of all rings in order,
    ring ``i`` having ``counts[i] + 1`` entries (``counts[i] == 0``: one vertex).
    Consecutive rings are zipped by merging their normalised parameters, so rings
    of different lengths join without slivers. Orientation: (a_p, a_p+1, b_q) and
    (a_p, b_q+1, b_q) face +z for rings running upper -> lower at increasing x.
    """
    counts = np.asarray(counts, dtype=np.int64)
    start = np.concatenate([[0], np.cumsum(counts + 1)[:-1]])
    na, nb = counts[:-1], counts[1:]
    pair = np.arange(len(na))
    # events: A steps of pair i at params (p+1)/na, B steps at (q+1)/nb
    pa = np.repeat(pair, na)
    ja = np.arange(pa.size) - np.repeat(np.cumsum(na) - na, na)
    pb = np.repeat(pair, nb)
    jb = np.arange(pb.size) - np.repeat(np.cumsum(nb) - nb, nb)
    ev_pair = np.concatenate([pa, pb])
    ev_param = np.concatenate([(ja + 1) / np.maximum(na[pa], 1), (jb + 1) / np.maximum(nb[pb], 1)])
    ev_isb = np.concatenate([np.zeros(pa.size, bool), np.ones(pb.size, bool)])
    order = np.lexsort((ev_isb, ev_param, ev_pair))
    ev_pair, ev_isb = ev_pair[order], ev_isb[order]
    # p, q = A and B steps taken before each event within its pair
    first = np.concatenate([[0], np.flatnonzero(np.diff(ev_pair)) + 1])
    seg_start = np.repeat(first, np.diff(np.concatenate([first, [ev_pair.size]])))
    cum_b = np.cumsum(ev_isb) - ev_isb
    cum_a = np.cumsum(~ev_isb) - (~ev_isb)
    q = cum_b - cum_b[seg_start]
    p = cum_a - cum_a[seg_start]
    a0 = start[ev_pair]
    b0 = start[ev_pair + 1]
    ring = np.asarray(ring_vertices)
    step_b = ev_isb.astype(np.int64)
    # A events: (a_p, a_p+1, b_q); B events: (a_p, b_q+1, b_q).
    second = np.where(ev_isb, ring[b0 + q + step_b], ring[a0 + p + 1 - step_b])
    tri = np.column_stack([ring[a0 + p], second, ring[b0 + q]])
    return tri[:, ::-1] if reverse else tri


def _half_disc(ring: np.ndarray, reverse: bool) -> np.ndarray:
    """Ladder triangulation of a half disc bounded by ``ring`` (r_0 .. r_n, a half circle).

    Faces +x for a ring bulging to +z and running upper -> lower.
    """
    n = len(ring) - 1
    tris = []
    j = np.arange(0, n)
    j = j[j + 1 <= n - j - 1]
    first = j[j + 1 < n - j - 1]
    tris.append(np.column_stack([ring[first], ring[first + 1], ring[n - first - 1]]))
    tris.append(np.column_stack([ring[j], ring[n - j - 1], ring[n - j]]))
    t = np.concatenate(tris)
    return t[:, ::-1] if reverse else t


@dataclass(frozen=True)
class _SpanSections:
    """Where each spanwise station's section goes: arrays of shape (n_span + 1,).

    ``z`` (metres) span position, ``chord`` (metres), ``x_le`` (metres) leading-edge
    offset along x, ``pitch`` (radians, nose-up) about the quarter chord.
    """

    z: np.ndarray
    chord: np.ndarray
    x_le: np.ndarray
    pitch: np.ndarray

    def place(self, px, py, pw, j: int) -> np.ndarray:
        """(m, 3) body-frame points of unit-chord section points (px, py) at station j.

        ``pw`` is an offset along z in chords (a rounded end's bulge).
        """
        c, t = self.chord[j], self.pitch[j]
        ox, oy = (np.asarray(px) - 0.25) * c, np.asarray(py) * c
        X = self.x_le[j] + 0.25 * c + ox * math.cos(t) + oy * math.sin(t)
        Y = -ox * math.sin(t) + oy * math.cos(t)
        return np.column_stack([X, Y, self.z[j] + np.asarray(pw) * c])


def _side_surface(loop: np.ndarray, sec: _SpanSections) -> tuple[np.ndarray, np.ndarray]:
    """Vertices (one loop per station, station-major) and outward faces of the straight part."""
    nloop, n_span = len(loop), len(sec.z) - 1
    c_col, t_col = sec.chord[:, None], sec.pitch[:, None]
    ox = (loop[None, :, 0] - 0.25) * c_col
    oy = loop[None, :, 1] * c_col
    X = sec.x_le[:, None] + 0.25 * c_col + ox * np.cos(t_col) + oy * np.sin(t_col)
    Y = -ox * np.sin(t_col) + oy * np.cos(t_col)
    Z = np.broadcast_to(sec.z[:, None], X.shape)
    verts = np.stack([X, Y, Z], axis=-1).reshape(-1, 3)
    jj, ii = np.meshgrid(np.arange(n_span), np.arange(nloop), indexing="ij")
    A = (jj * nloop + ii).ravel()
    B = (jj * nloop + (ii + 1) % nloop).ravel()
    C = B + nloop
    D = A + nloop
    # Diagonals alternate from one spanwise row to the next: on a twisted (non-planar)
    # quad each choice biases the volume by O(dtheta^2) with opposite signs, so
    # alternating rows cancel the bias to second order in the spanwise spacing.
    odd = (jj.ravel() % 2).astype(bool)
    t1 = np.where(odd[:, None], np.column_stack([A, B, D]), np.column_stack([A, B, C]))
    t2 = np.where(odd[:, None], np.column_stack([B, C, D]), np.column_stack([A, C, D]))
    return verts, np.concatenate([t1, t2])


def _end_cap(section, x, counts, style, sign, ends, first_id, sec: _SpanSections, j: int):
    """Vertices and faces closing one end of the straight part.

    Parameters
    ----------
    section : Section; x : (k + 1,) float — camber-line stations, fraction of chord.
    counts : (k + 1,) int — wanted intervals across each station's ring.
    style : "flat" or "round"; sign : +1 for the tip end (outward +z), -1 for the root.
    ends : ((k + 1,), (k + 1,)) int — ids of the end section's upper and lower points.
    first_id : int — id of the first new vertex.
    sec, j : the span stations and the index of this end's station.

    Returns
    -------
    vertices : (m, 3) float — metres, the new vertices; faces : (f, 3) int — outward.
    """
    k = len(x) - 1
    up_ids, low_ids = ends
    yt = section.thickness(x)
    theta = np.arctan(section.camber_slope(x))
    yc = section.camber(x)
    counts = np.maximum(counts, 2 if style == "round" else 1)
    counts[yt <= 0] = 0  # LE, and a closed TE: a single vertex
    if style == "flat" and not section.closed_te:
        counts[-1] = 1  # the blunt base edge of the side surface
    # A flat end near a round nose: the stations there are far closer together than
    # the rings are long, so ring strips would be needles. Stations ahead of
    # x = 2 r_LE are instead fanned from one point at x = r_LE on the camber line
    # (about the nose circle's centre), which sees the nose arc in equal small angles.
    nose = 0
    if style == "flat":
        nose = int(np.searchsorted(x, 2.0 * section.le_radius))
        nose = nose if 2 <= nose < k else 0
        counts[1:nose] = 1
    # interior ring points, vectorised over stations
    n_int = np.maximum(counts - 1, 0)
    st = np.repeat(np.arange(k + 1), n_int)
    jr = np.arange(st.size) - np.repeat(np.cumsum(n_int) - n_int, n_int) + 1
    frac = jr / counts[st]
    if style == "round":
        radial, out = np.cos(np.pi * frac), np.sin(np.pi * frac)
    else:
        radial, out = 1.0 - 2.0 * frac, np.zeros_like(frac)
    px = x[st] - np.sin(theta[st]) * yt[st] * radial
    py = yc[st] + np.cos(theta[st]) * yt[st] * radial
    verts = [sec.place(px, py, sign * yt[st] * out, j)]
    # global ids of each ring: upper end, interior..., lower end
    ring_ids = np.empty(int(np.sum(counts + 1)), dtype=np.int64)
    rstart = np.concatenate([[0], np.cumsum(counts + 1)[:-1]])
    ring_ids[rstart] = up_ids
    ring_ids[rstart + counts] = low_ids
    ring_ids[np.repeat(rstart, n_int) + jr] = first_id + np.arange(st.size)
    faces = [_zip_rings(ring_ids[rstart[nose]:], counts[nose:], reverse=(sign < 0))]
    if nose:
        x_p = np.array([section.le_radius])
        verts.append(sec.place(x_p, section.camber(x_p), np.zeros(1), j))
        inner = ring_ids[rstart[nose] + 1: rstart[nose] + counts[nose]]
        cycle = np.concatenate([up_ids[nose::-1], low_ids[1: nose + 1], inner[::-1]])
        fan = np.column_stack([np.full(len(cycle), first_id + st.size), cycle, np.roll(cycle, -1)])
        faces.append(fan[:, ::-1] if sign < 0 else fan)
    if style == "round" and not section.closed_te:
        last = ring_ids[rstart[-1]: rstart[-1] + counts[-1] + 1]
        faces.append(_half_disc(last, reverse=(sign < 0)))
    return np.concatenate(verts), np.concatenate(faces)


def make_wing(
    section,
    chord: float,
    span: float,
    *,
    taper: float = 1.0,
    sweep: float = 0.0,
    twist: float = 0.0,
    tips: str = "flat",
    root: str | None = None,
    centred: bool = False,
    n_chord: int | None = None,
    n_span: int | None = None,
    n_tip: int | None = None,
    faces: int | None = None,
):
    """A finite-span wing as a watertight, outward-oriented triangle surface.

    Parameters
    ----------
    section : Section or str — the section (a NACA code is passed to :func:`naca4`).
        Its thickness and camber functions are sampled at the wing's own
        chordwise stations; its ``closed_te`` choice is kept.
    chord : float — metres; root chord.
    span : float — metres; tip-to-tip length along z, rounded ends included.
    taper : float — tip chord / root chord (> 0).
    sweep : float — radians; leading-edge sweep angle (aft positive), |sweep| <= 75 deg.
    twist : float — radians; incidence of the tip section relative to the root,
        about the quarter chord, nose-up positive, varying linearly along the
        straight part; |twist| <= 60 deg. Washout is negative.
    tips : {"flat", "round"} — how the tip end (and, unless ``root`` says
        otherwise, the root end) is closed.
    root : {"flat", "round"} or None — how the root end is closed; None = as ``tips``.
    centred : bool — False: root end at z = 0, tip end at z = span.
        True: mid-span at z = 0.
    n_chord : int, optional — chordwise intervals per surface (>= 4).
    n_span : int, optional — spanwise intervals along the straight part (>= 1).
    n_tip : int, optional — intervals across the thickest station of an end (>= 2);
        thinner stations get proportionally fewer.
    faces : int, optional — approximate triangle count; sets ``n_chord`` (and
        ``n_span``) when they are not given. Default: ``n_chord = 32`` and the
        spanwise spacing that keeps triangles compact.

    Returns
    -------
    trimesh.Trimesh
        Watertight, consistently outward-oriented, built with ``process=False``.
        ``mesh.metadata['wing']`` holds the :class:`WingLayout` used.

    Raises
    ------
    InputError
        Non-positive chord, span or taper; angles out of range; unknown tip
        style; a span too short for its rounded ends; bad counts; a section
        whose thickness folds its camber-normal construction
        (:attr:`Section.fold_ratio` >= 0.9, only extreme codes such as 7124).

    Notes
    -----
    With flat ends, no twist and the straight part's linear taper, the mesh
    volume is exactly ``A_loop c_r^2 L (1 + lambda + lambda^2) / 3`` (``A_loop``
    the area of ``layout.loop``, ``L`` the straight length), because every side
    quad is a planar trapezoid.
    """
    if isinstance(section, str):
        section = naca4(section)
    if not isinstance(section, Section):
        raise InputError(f"section must be a Section (from naca4) or a NACA code, got {type(section).__name__}")
    c_root = _positive("chord", chord)
    b = _positive("span", span)
    lam = _positive("taper", taper)
    try:
        sweep, twist = float(sweep), float(twist)
    except (TypeError, ValueError):
        raise InputError(f"sweep and twist must be angles in radians, got {sweep!r} and {twist!r}") from None
    if not (math.isfinite(sweep) and abs(sweep) <= _MAX_SWEEP):
        raise InputError(f"sweep must be an angle in radians within +-75 deg (1.309 rad), got {sweep!r}")
    if not (math.isfinite(twist) and abs(twist) <= _MAX_TWIST):
        raise InputError(f"twist must be an angle in radians within +-60 deg (1.047 rad), got {twist!r}")
    if tips not in _TIPS:
        raise InputError(f"tips must be one of {_TIPS}, got {tips!r}")
    root = tips if root is None else root
    if root not in _TIPS:
        raise InputError(f"root must be one of {_TIPS} or None, got {root!r}")
    if section.fold_ratio >= _MAX_FOLD_RATIO:
        raise InputError(
            f"NACA {section.code} is thicker than its camber line's radius of curvature allows "
            f"(half-thickness x curvature reaches {section.fold_ratio:.2f}); the end caps, laid "
            "off perpendicular to the camber line, would fold. Use a thinner section or put the "
            "maximum camber further aft (second digit 2 or more)"
        )
    n_chord = _count("n_chord", n_chord, 4)
    n_span = _count("n_span", n_span, 1)
    n_tip = _count("n_tip", n_tip, 2)
    faces = _count("faces", faces, 200)
    c_tip = lam * c_root

    ytmax = float(section.thickness(cosine_stations(_FINE_SEGMENTS)).max())
    e_root = ytmax * c_root if root == "round" else 0.0
    e_tip = ytmax * c_tip if tips == "round" else 0.0
    length = b - e_root - e_tip
    if length <= 1e-9 * b:
        raise InputError(
            f"span {b:.6g} m leaves no straight part between the rounded ends (they take "
            f"{e_root + e_tip:.6g} m); give a longer span or flat ends"
        )
    c_mean = 0.5 * (c_root + c_tip)

    # Chordwise resolution and the spanwise spacing that keeps triangles compact.
    probe = wing_stations(section, 64)
    xu, yu = section.upper(probe)
    flat_spacing_per_segment = np.hypot(np.diff(xu), np.diff(yu)).max() * 64  # chord units x segments
    if n_chord is None:
        if faces is None:
            n_chord = _DEFAULT_N_CHORD
        else:
            # faces ~ 2 * (2 n_chord) * n_span, n_span = L sqrt(G) n_chord / (c_mean * flat_spacing)
            ratio = length * math.sqrt(_LE_GRADING) / (c_mean * flat_spacing_per_segment)
            n_chord = max(4, int(round(math.sqrt(faces / (4.0 * ratio)))))
    x = wing_stations(section, n_chord)
    k = n_chord
    h_flat = c_mean * flat_spacing_per_segment / k
    h_span = h_flat / math.sqrt(_LE_GRADING)
    if n_span is None:
        if faces is not None:
            n_span = max(1, int(round(faces / (4.0 * k))))
        else:
            n_span = max(1, int(math.ceil(length / h_span)))
    h_cap = min(h_span, length / n_span)  # arc spacing aimed for around a cap

    # ---- section outline (unit chord) at the stations: shared LE (and TE if closed)
    closed = section.closed_te
    xu, yu = section.upper(x)
    xl, yl = section.lower(x)
    if closed:
        loop = np.column_stack([np.concatenate([xu[::-1], xl[1:-1]]), np.concatenate([yu[::-1], yl[1:-1]])])
    else:
        loop = np.column_stack([np.concatenate([xu[::-1], xl[1:]]), np.concatenate([yu[::-1], yl[1:]])])
    nloop = len(loop)
    up_idx = k - np.arange(k + 1)
    low_idx = np.concatenate([[k], k + np.arange(1, k), [0 if closed else 2 * k]])

    # ---- spanwise placement of the straight part
    z0 = -0.5 * b if centred else 0.0
    z_root, z_tip = z0 + e_root, z0 + b - e_tip
    frac = np.linspace(0.0, 1.0, n_span + 1)
    zs = z_root + frac * length
    span_sections = _SpanSections(
        z=zs, chord=c_root * (1.0 + (lam - 1.0) * frac), x_le=(zs - z_root) * math.tan(sweep), pitch=twist * frac
    )
    side_v, side_f = _side_surface(loop, span_sections)
    verts, tris, nv = [side_v], [side_f], len(side_v)

    # ---- ends
    for style, j, sign in ((root, 0, -1.0), (tips, n_span, +1.0)):
        if n_tip is None:
            per = (np.pi if style == "round" else 2.0) * span_sections.chord[j] / h_cap
            counts = np.ceil(per * section.thickness(x)).astype(np.int64)
        else:
            counts = np.ceil(n_tip * section.thickness(x) / ytmax - 1e-9).astype(np.int64)
        ends = (j * nloop + up_idx, j * nloop + low_idx)
        cap_v, cap_f = _end_cap(section, x, counts, style, sign, ends, nv, span_sections, j)
        verts.append(cap_v)
        tris.append(cap_f)
        nv += len(cap_v)

    vertices = np.concatenate(verts)
    faces_arr = np.concatenate(tris)
    mesh = mesh_from_arrays(vertices, faces_arr)
    tip_counts = int(n_tip) if n_tip is not None else int(np.ceil(np.pi * c_tip / h_cap * ytmax))
    mesh.metadata["wing"] = WingLayout(
        n_chord=k, n_span=int(n_span), n_tip=tip_counts, stations=x, loop=loop,
        z_root=float(z_root), z_tip=float(z_tip),
    )
    return mesh
