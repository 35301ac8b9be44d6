"""Arrival direction of a plane front from hit times at distant sites.

Model: a plane front from the unit direction ``n`` (ECEF, pointing from the
Earth towards the source) reaches a site at ECEF position ``r`` (metres) at
``t = t0 − (n · r) / c``, ``t0`` being the time the front passes the Earth's
centre. Sites have independent Gaussian clock errors with 1σ ``σ_i`` (ns).

Two tools:

* :func:`solve_triples` — the hot path. Closed-form direction from one seed
  site s and two partner sites j, k, vectorised over many triples at once, with
  first-order prediction of every other site's delay and its 1σ error
  (:meth:`TripleSolution.predict`). Used to decide which further hits are
  consistent with one front.
* :func:`fit_front` — weighted least squares over all hits of one candidate
  (weights 1/σ²), started from the triple solutions, with covariance, χ² and a
  flag for the mirror ambiguity of (nearly) coplanar sites.

Units: positions and baselines in metres, times and delays in ns (float ns only
for differences relative to a reference hit; absolute times are int64 GPS ns),
angles in radians unless a name ends in ``_deg``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, TypeAlias

import numpy as np
from numpy.typing import NDArray

from tocsin.engine.geometry import (
    MIN_TRIANGLE_ANGLE_DEG,
    ellipsoid_up,
    noncollinear,
    triangle_min_angle_deg,
    widest_triangle,
)
from tocsin.engine.sky import ecef_unit_to_radec
from tocsin.types import C_M_PER_NS, BoolArray, F64Array, GpsNs, I64Array

IntArray: TypeAlias = NDArray[np.integer[Any]]
"""Site indices: any integer dtype."""

MIRROR_DCHI2: float = 1.0
"""Two mirror solutions whose χ² differ by less than this fit equally well.

Δχ² = 1 is a one-sigma change of the likelihood for one parameter (common
practice); below it the data do not tell the mirrors apart.
"""

MAX_CONDITION: float = 1e12
"""Largest condition number of the (scaled) normal matrix for which a fit is returned."""

_CHI2_TOL = 1e-8
"""Relative χ² gain below which the iteration stops."""

_SAME_DIRECTION_RAD = 1e-7
"""Two converged solutions closer than this (radians) are the same minimum."""


# --------------------------------------------------------------------------- triples


@dataclass(frozen=True, slots=True)
class DelayPrediction:
    """Predicted delays of further sites from a set of triple solutions.

    ``delay_ns[m_sol, i, l]`` is the predicted ``t_l − t_s`` (ns) for triple ``i``,
    further site ``l`` and solution ``m_sol`` (0: ``n0 + α e3``, 1: ``n0 − α e3``).
    ``sigma_ns`` is its 1σ error from the three clock errors of the triple (see
    :meth:`TripleSolution.predict`). Invalid triples give NaN.
    """

    delay_ns: F64Array
    sigma_ns: F64Array


@dataclass(frozen=True, slots=True)
class TripleSolution:
    """Directions solving ``n · b_j = c Δt_j``, ``n · b_k = c Δt_k``, ``|n| = 1`` for M triples.

    Fields (M triples):

    * ``n`` (2, M, 3): the two solutions ``n0 ± α e3`` (unit ECEF vectors; NaN
      where invalid). Equal when ``clamped``.
    * ``valid`` (M,): a direction exists within the tolerance and the triangle
      is not degenerate.
    * ``clamped`` (M,): ``|n0|`` exceeded 1 by no more than the tolerance allowed,
      so ``α`` was set to 0 and ``n0`` normalised (a front along the triangle's plane).
    * ``n0`` (M, 3): minimum-norm solution in span(b_j, b_k); ``e3`` (M, 3): unit
      normal ``b_j × b_k / |b_j × b_k|``; ``alpha2`` (M,): ``1 − |n0|²`` (may be < 0).
    * ``u_j``, ``u_k`` (M, 3), 1/m: dual vectors in span(b_j, b_k) with
      ``u_j · b_j = 1``, ``u_j · b_k = 0`` (and the reverse), so ``n0 = c Δt_j u_j + c Δt_k u_k``
      and ``∂n0/∂(c Δt_j) = u_j``.
    """

    n: F64Array
    valid: BoolArray
    clamped: BoolArray
    n0: F64Array
    e3: F64Array
    alpha2: F64Array
    u_j: F64Array
    u_k: F64Array

    def take(self, index: IntArray | BoolArray) -> TripleSolution:
        """The solutions of a subset of the triples (integer indices or a boolean mask)."""
        return TripleSolution(
            n=self.n[:, index],
            valid=self.valid[index],
            clamped=self.clamped[index],
            n0=self.n0[index],
            e3=self.e3[index],
            alpha2=self.alpha2[index],
            u_j=self.u_j[index],
            u_k=self.u_k[index],
        )

    def predict(
        self,
        b_l: F64Array,
        sigma_s: F64Array | float,
        sigma_j: F64Array | float,
        sigma_k: F64Array | float,
    ) -> DelayPrediction:
        """Predicted delays ``Δt_l = (n · b_l) / c`` (ns) of further sites, with 1σ errors.

        ``b_l = r_s − r_l`` (metres) has shape (M, L, 3), or (L, 3) for the same
        further sites in every triple (see :func:`seed_baselines`). ``sigma_s``,
        ``sigma_j``, ``sigma_k`` are the 1σ clock errors (ns) of the triple's
        sites, scalars or shape (M,).

        Error propagation, first order. With clock errors ε, the measured delays
        carry ``δΔt_j = ε_j − ε_s`` and ``δΔt_k = ε_k − ε_s``; writing
        ``g_j = ∂Δt_l/∂Δt_j = b_l · ∂n/∂(c Δt_j)`` (and ``g_k`` alike), the predicted
        arrival ``t_s + Δt_l`` at site l is off by
        ``(1 − g_j − g_k) ε_s + g_j ε_j + g_k ε_k``: the seed's error is common to
        both delays and to the prediction itself. ``sigma_ns`` is the 1σ of that;
        it does **not** include site l's own clock, which the caller adds in
        quadrature when comparing with a measured ``t_l − t_s``. For ``l = j``
        this gives exactly ``σ_j``.

        Singularity: ``∂n±/∂d = u ∓ (n0 · u) / α e3`` diverges as ``α → 0``. The
        cap replaces α by ``α_r = sqrt(max(α², 0) + σ(α²))`` where
        ``σ(α²) = 2 c sqrt(x² σ_j² + y² σ_k² + (x + y)² σ_s²)`` (``x = n0 · u_j``,
        ``y = n0 · u_k``) is the first-order 1σ of ``α² = 1 − |n0|²`` itself: the
        derivative never exceeds what a one-sigma change of the delays can do to
        α. Well away from the singularity (``α² ≫ σ(α²)``) this is the plain
        first-order result. For clamped triples the same formula is used, which
        keeps the in-plane radial part of the error (conservative).
        """
        bl = np.asarray(b_l, dtype=np.float64)
        m = self.n0.shape[0]
        if bl.ndim == 2:
            bl = np.broadcast_to(bl[None, :, :], (m, *bl.shape))
        if bl.ndim != 3 or bl.shape[0] != m or bl.shape[2] != 3:
            raise ValueError(
                f"further baselines must have shape (M, L, 3) or (L, 3) with M = {m}, "
                f"got {np.shape(b_l)}"
            )
        ss, sj, sk = (
            np.broadcast_to(np.asarray(s, dtype=np.float64), (m,))
            for s in (sigma_s, sigma_j, sigma_k)
        )
        delay = np.einsum("pmc,mlc->pml", self.n, bl) / C_M_PER_NS

        x = np.einsum("mc,mc->m", self.n0, self.u_j)
        y = np.einsum("mc,mc->m", self.n0, self.u_k)
        s_alpha2 = 2.0 * C_M_PER_NS * np.sqrt((x * sj) ** 2 + (y * sk) ** 2 + ((x + y) * ss) ** 2)
        alpha_r = np.sqrt(np.maximum(self.alpha2, 0.0) + s_alpha2)
        with np.errstate(divide="ignore", invalid="ignore"):
            inv_alpha = np.where(alpha_r > 0.0, 1.0 / alpha_r, 0.0)
        ul_j = np.einsum("mlc,mc->ml", bl, self.u_j)
        ul_k = np.einsum("mlc,mc->ml", bl, self.u_k)
        el = np.einsum("mlc,mc->ml", bl, self.e3) * inv_alpha[:, None]
        sign = np.array([1.0, -1.0])[:, None, None]
        g_j = ul_j[None] - sign * (x[:, None] * el)[None]
        g_k = ul_k[None] - sign * (y[:, None] * el)[None]
        var = (
            ((1.0 - g_j - g_k) * ss[None, :, None]) ** 2
            + (g_j * sj[None, :, None]) ** 2
            + (g_k * sk[None, :, None]) ** 2
        )
        sigma = np.sqrt(var)
        bad = ~self.valid
        delay[:, bad, :] = np.nan
        sigma[:, bad, :] = np.nan
        return DelayPrediction(delay_ns=delay, sigma_ns=sigma)


def seed_baselines(ecef_m: F64Array, seed: IntArray, other: IntArray) -> F64Array:
    """Baselines ``r_seed − r_other`` (metres) from site indices.

    ``seed`` has shape (M,); ``other`` (M,) gives shape (M, 3), ``other`` (M, L)
    gives (M, L, 3); ``ecef_m`` is the (N, 3) ECEF position table.
    """
    pos = np.asarray(ecef_m, dtype=np.float64)
    s = np.asarray(seed, dtype=np.int64)
    o = np.asarray(other, dtype=np.int64)
    if s.ndim != 1 or o.shape[:1] != s.shape or o.ndim > 2:
        raise ValueError(f"seed must be (M,) and other (M,) or (M, L); got {s.shape} and {o.shape}")
    rs = pos[s]
    if o.ndim == 2:
        rs = rs[:, None, :]
    out: F64Array = rs - pos[o]
    return out


def solve_triples(
    b_j: F64Array,
    b_k: F64Array,
    dt_j_ns: F64Array,
    dt_k_ns: F64Array,
    *,
    tol_ns: float = 0.0,
    min_angle_deg: float = MIN_TRIANGLE_ANGLE_DEG,
) -> TripleSolution:
    """Closed-form front directions for M triples (seed s, partners j, k) at once.

    ``b_j = r_s − r_j`` and ``b_k = r_s − r_k`` (metres, (M, 3)); ``dt_j_ns = t_j − t_s``
    and ``dt_k_ns = t_k − t_s`` (ns, (M,), float64 differences of int64 GPS times).
    Solves ``n · b_j = c Δt_j``, ``n · b_k = c Δt_k``, ``|n| = 1``:
    ``n = n0 ± α e3`` with ``n0`` the minimum-norm solution in span(b_j, b_k),
    ``e3`` the unit normal and ``α = sqrt(1 − |n0|²)``.

    Tolerance: when ``|n0| > 1`` but a change of at most ``tol_ns`` in each
    measured delay can bring it to 1 — to first order,
    ``|n0| − 1 ≤ c tol_ns (|x| + |y|) / |n0|`` with ``x = n0 · u_j``, ``y = n0 · u_k``
    (the largest decrease of ``|n0|`` over that box of delay changes) — the
    triple is valid with ``α = 0`` and ``n0`` normalised (``clamped``).

    Invalid: triangles whose smallest interior angle is below ``min_angle_deg``
    (nearly collinear, :func:`~tocsin.engine.geometry.triangle_min_angle_deg`),
    non-finite input, or ``|n0|`` beyond the tolerance. No Python loop over triples.
    """
    bj = np.asarray(b_j, dtype=np.float64)
    bk = np.asarray(b_k, dtype=np.float64)
    dj = np.asarray(dt_j_ns, dtype=np.float64) * C_M_PER_NS
    dk = np.asarray(dt_k_ns, dtype=np.float64) * C_M_PER_NS
    if bj.ndim != 2 or bj.shape[1] != 3 or bk.shape != bj.shape:
        raise ValueError(f"baselines must both be (M, 3) metres, got {bj.shape} and {bk.shape}")
    if dj.shape != bj.shape[:1] or dk.shape != bj.shape[:1]:
        raise ValueError(
            f"delays must be (M,) = ({bj.shape[0]},) ns, got {dj.shape} and {dk.shape}"
        )
    if not tol_ns >= 0.0:
        raise ValueError(f"tol_ns must be >= 0 ns, got {tol_ns!r}")

    w = np.cross(bj, bk)
    w2 = np.einsum("mc,mc->m", w, w)
    shape_ok = triangle_min_angle_deg(bj, bk) >= min_angle_deg
    finite = np.isfinite(w2) & np.isfinite(dj) & np.isfinite(dk)
    ok = shape_ok & finite & (w2 > 0.0)
    w2s = np.where(ok, w2, 1.0)[:, None]
    u_j = np.cross(bk, w) / w2s
    u_k = np.cross(w, bj) / w2s
    e3 = w / np.sqrt(w2s)
    n0 = dj[:, None] * u_j + dk[:, None] * u_k
    norm0 = np.linalg.norm(n0, axis=1)
    alpha2 = 1.0 - norm0**2

    x = np.einsum("mc,mc->m", n0, u_j)
    y = np.einsum("mc,mc->m", n0, u_k)
    with np.errstate(divide="ignore", invalid="ignore"):
        slack = C_M_PER_NS * tol_ns * (np.abs(x) + np.abs(y)) / norm0
    over = alpha2 < 0.0
    clamped = ok & over & (norm0 - 1.0 <= slack)
    valid = ok & (~over | clamped)

    alpha = np.sqrt(np.where(valid & ~over, alpha2, 0.0))
    base = np.where(clamped[:, None], n0 / np.where(norm0 > 0.0, norm0, 1.0)[:, None], n0)
    n = np.stack([base + alpha[:, None] * e3, base - alpha[:, None] * e3])
    n[:, ~valid, :] = np.nan
    return TripleSolution(
        n=n, valid=valid, clamped=clamped, n0=n0, e3=e3, alpha2=alpha2, u_j=u_j, u_k=u_k
    )


# --------------------------------------------------------------------------- full fit


@dataclass(frozen=True, slots=True)
class FrontFit:
    """Weighted least-squares plane front through K ≥ 3 hits at distinct sites.

    * ``n``: unit ECEF vector from the Earth towards the source.
    * ``t0_ns``: GPS ns at which the front passes the Earth's centre,
      ``t0 = t_i + n · r_i / c`` (rounded to the ns); ``t0_sigma_ns`` its 1σ.
    * ``t_ref_ns``: the earliest hit (GPS ns); all internal arithmetic is in
      float ns relative to it.
    * ``chi2``, ``ndof = K − 3`` (unknowns t0 and two direction angles).
    * ``residuals_ns`` (K,): measured minus fitted arrival time, ns.
    * ``cov_rad2`` (2, 2): covariance of the direction in the tangent plane at
      ``n`` (rad²), in the basis ``tangent_basis`` (2, 3): ``e1 ∝ ẑ × n``
      (towards increasing longitude), ``e2 = n × e1`` (towards the north pole).
    * ``err_deg``: 1σ error radius, circularised: ``sqrt(sqrt(det cov))`` in
      degrees, the geometric mean of the error ellipse's semi-axes (the radius
      of the circle with the ellipse's area). For a round ellipse the angular
      error then follows a Rayleigh law: 39.3 % within 1 ``err_deg``.
    * ``ambiguous``: two mirror solutions fit equally (χ² within
      :data:`MIRROR_DCHI2`), as always for exactly 3 sites and for (nearly)
      coplanar sites; ``n`` is then the one with the source above the horizon
      of more of the sites, and ``mirror_n`` the other (else None).
    """

    n: F64Array
    t0_ns: GpsNs
    t0_sigma_ns: float
    t_ref_ns: GpsNs
    chi2: float
    ndof: int
    residuals_ns: F64Array
    cov_rad2: F64Array
    tangent_basis: F64Array
    err_deg: float
    ambiguous: bool
    mirror_n: F64Array | None


def tangent_basis(n: F64Array) -> F64Array:
    """Orthonormal (2, 3) basis of the tangent plane at the unit vector ``n``.

    ``e1 ∝ ẑ × n`` (towards increasing longitude) and ``e2 = n × e1`` (northwards).
    At the poles (``|ẑ × n|`` < 1e-9) ``e1`` is taken along ``x̂ × n`` instead.
    """
    x, y, z = (float(c) for c in np.asarray(n, dtype=np.float64).reshape(3))
    h = math.hypot(x, y)
    if h >= 1e-9:
        e1 = (-y / h, x / h, 0.0)  # ẑ × n, normalised
    else:
        h = math.hypot(y, z)
        e1 = (0.0, -z / h, y / h)  # x̂ × n, normalised
    e2 = (
        y * e1[2] - z * e1[1],
        z * e1[0] - x * e1[2],
        x * e1[1] - y * e1[0],
    )
    out: F64Array = np.array([e1, e2])
    out[1] /= float(np.linalg.norm(out[1]))
    return out


@dataclass(frozen=True, slots=True)
class _Minimum:
    n: F64Array
    t0c: float
    chi2: float
    normal: F64Array
    basis: F64Array


def _normal_matrix(
    rho_ns: F64Array, w: F64Array, n: F64Array
) -> tuple[F64Array, F64Array, F64Array]:
    basis = tangent_basis(n)
    jac = np.empty((rho_ns.shape[0], 3))
    jac[:, 0] = 1.0
    jac[:, 1:] = -(rho_ns @ basis.T)
    normal: F64Array = jac.T @ (w[:, None] * jac)
    return jac, normal, basis


def _chi2(rho_ns: F64Array, tau: F64Array, w: F64Array, n: F64Array, t0c: float) -> float:
    res = tau - (t0c - rho_ns @ n)
    return float(np.sum(w * res * res))


def _refine(
    rho_ns: F64Array, tau: F64Array, w: F64Array, start: F64Array, max_iter: int
) -> _Minimum:
    """Levenberg–Marquardt on (t0c, two tangent-plane angles) from ``start``."""
    n = start / float(np.linalg.norm(start))
    t0c = float(np.sum(w * (tau + rho_ns @ n)) / np.sum(w))  # best t0c for this n
    chi2 = _chi2(rho_ns, tau, w, n, t0c)
    lam = 0.0
    for _ in range(max_iter):
        jac, normal, basis = _normal_matrix(rho_ns, w, n)
        res = tau - (t0c - rho_ns @ n)
        grad = jac.T @ (w * res)
        damped = normal + lam * np.diag(np.diag(normal))
        try:
            step = np.linalg.solve(damped, grad)
        except np.linalg.LinAlgError:
            break
        ang = float(np.hypot(step[1], step[2]))
        if ang > 0.5:  # stay where the tangent-plane step means something
            step = step * (0.5 / ang)
            ang = 0.5
        n_new = n + step[1] * basis[0] + step[2] * basis[1]
        n_new = n_new / float(np.linalg.norm(n_new))
        t0_new = t0c + float(step[0])
        chi2_new = _chi2(rho_ns, tau, w, n_new, t0_new)
        if chi2_new <= chi2 * (1.0 + 1e-12) + 1e-12:
            n, t0c, chi2 = n_new, t0_new, chi2_new
            lam = lam * 0.1 if lam > 1e-6 else 0.0
            # converged when the step's predicted χ² gain is negligible (parameters
            # then move by < 1e-4 of their 1σ errors) or the step is at float level
            if float(step @ grad) < _CHI2_TOL * (1.0 + chi2) or ang < 1e-13:
                break
        else:
            lam = max(lam * 10.0, 1e-3)
            if lam > 1e8:
                break
    _, normal, basis = _normal_matrix(rho_ns, w, n)
    return _Minimum(n=n, t0c=t0c, chi2=chi2, normal=normal, basis=basis)


def _above_horizon(up: F64Array, n: F64Array) -> tuple[int, float]:
    sin_el = up @ n
    return int(np.count_nonzero(sin_el > 0.0)), float(np.sum(sin_el))


def _start_directions(
    pos: F64Array, tau: F64Array, sigma: F64Array, min_angle_deg: float
) -> list[F64Array]:
    """Both mirror solutions of the widest triangle of sites (tolerant clamping)."""
    (a, b, k), _ = widest_triangle(pos)
    tol = 5.0 * float(np.max(sigma[[a, b, k]]))
    sol = solve_triples(
        (pos[a] - pos[b])[None, :],
        (pos[a] - pos[k])[None, :],
        np.array([tau[b] - tau[a]]),
        np.array([tau[k] - tau[a]]),
        tol_ns=tol,
        min_angle_deg=min_angle_deg,
    )
    if bool(sol.valid[0]):
        return [sol.n[0, 0], sol.n[1, 0]]
    n0 = sol.n0[0]  # too far outside the unit sphere: start from the horizontal front
    norm = float(np.linalg.norm(n0))
    return [n0 / norm] if np.isfinite(norm) and norm > 0.0 else []


def fit_front(
    ecef_m: F64Array,
    t_ns: I64Array,
    sigma_ns: F64Array,
    *,
    guess: F64Array | None = None,
    min_angle_deg: float = MIN_TRIANGLE_ANGLE_DEG,
    max_iter: int = 50,
) -> FrontFit | None:
    """Weighted least-squares plane front through hits at K distinct sites, or None.

    ``ecef_m`` (K, 3) site positions in metres, ``t_ns`` (K,) int64 GPS ns hit
    times, ``sigma_ns`` (K,) 1σ clock errors in ns (weights 1/σ²). ``guess``: an
    optional ECEF direction to start from as well (e.g. a triple solution).

    Method: times become float ns relative to the earliest hit (the int64
    subtraction comes first); positions are centred on their weighted centroid
    r̄, so the unknowns are the front time at r̄ and the direction, parametrised
    by two angles in the tangent plane at the current direction. Levenberg–
    Marquardt starts from both mirror solutions of the widest triangle of sites
    (and ``guess``), and again from the best result reflected through the sites'
    best-fit plane. The lowest χ² wins; if another distinct minimum is within
    :data:`MIRROR_DCHI2`, the fit is ``ambiguous`` and the solution with the
    source above the horizon (local WGS84 zenith) of more sites is preferred,
    ties going to the larger summed sine of elevation.

    Returns None (never raises for these) with fewer than 3 sites, collinear
    sites (:func:`~tocsin.engine.geometry.noncollinear` with ``min_angle_deg``)
    or a singular normal matrix (condition number > :data:`MAX_CONDITION`).
    Raises ``ValueError`` for inconsistent shapes or non-positive sigmas.
    """
    pos = np.asarray(ecef_m, dtype=np.float64)
    t = np.asarray(t_ns)
    sigma = np.asarray(sigma_ns, dtype=np.float64)
    if pos.ndim != 2 or pos.shape[1] != 3:
        raise ValueError(f"site positions must be (K, 3) metres, got {pos.shape}")
    if t.shape != pos.shape[:1] or sigma.shape != pos.shape[:1]:
        raise ValueError(
            f"need one time and one sigma per site: positions {pos.shape}, "
            f"times {t.shape}, sigmas {sigma.shape}"
        )
    if t.dtype != np.int64:
        raise ValueError(f"hit times must be int64 GPS ns, got dtype {t.dtype}")
    if not np.all(np.isfinite(sigma) & (sigma > 0.0)):
        raise ValueError(f"clock sigmas must be finite and > 0 ns, got {sigma.tolist()}")
    k = pos.shape[0]
    if k < 3 or not noncollinear(pos, min_angle_deg=min_angle_deg):
        return None

    t_ref = int(t.min())
    tau = (t - np.int64(t_ref)).astype(np.float64)  # small differences: exact in float64
    w = 1.0 / sigma**2
    centre = (w @ pos) / float(np.sum(w))
    rho_ns = (pos - centre) / C_M_PER_NS

    starts = _start_directions(pos, tau, sigma, min_angle_deg)
    if guess is not None:
        g = np.asarray(guess, dtype=np.float64).reshape(3)
        if np.all(np.isfinite(g)) and float(np.linalg.norm(g)) > 0.0:
            starts.insert(0, g)
    if not starts:
        return None
    minima = [_refine(rho_ns, tau, w, s, max_iter) for s in starts]
    best = min(minima, key=lambda m: m.chi2)
    # mirror through the sites' best-fit plane: its normal is the direction of
    # least spread of the (weighted, centred) positions.
    _, _, vt = np.linalg.svd(rho_ns * np.sqrt(w)[:, None], full_matrices=False)
    p = vt[-1]
    minima.append(_refine(rho_ns, tau, w, best.n - 2.0 * float(best.n @ p) * p, max_iter))

    distinct: list[_Minimum] = []
    for m in sorted(minima, key=lambda m: m.chi2):
        if all(float(np.linalg.norm(m.n - d.n)) > _SAME_DIRECTION_RAD for d in distinct):
            distinct.append(m)
    best = distinct[0]
    ambiguous = len(distinct) > 1 and distinct[1].chi2 - best.chi2 < MIRROR_DCHI2
    mirror: _Minimum | None = None
    if ambiguous:
        up = ellipsoid_up(pos)
        pair = sorted(distinct[:2], key=lambda m: _above_horizon(up, m.n), reverse=True)
        best, mirror = pair[0], pair[1]

    scale = np.sqrt(np.diag(best.normal))
    if not np.all(scale > 0.0):
        return None
    scaled = best.normal / np.outer(scale, scale)
    if not np.isfinite(np.linalg.cond(scaled)) or np.linalg.cond(scaled) > MAX_CONDITION:
        return None
    cov3 = np.linalg.inv(scaled) / np.outer(scale, scale)
    cov2: F64Array = cov3[1:, 1:]
    det = float(np.linalg.det(cov2))
    err_deg = float(np.degrees(np.sqrt(np.sqrt(max(det, 0.0)))))

    centre_ns = centre / C_M_PER_NS
    t0_rel = best.t0c + float(best.n @ centre_ns)  # front time at the Earth's centre
    grad = np.array([1.0, *(best.basis @ centre_ns)])
    t0_sigma = float(np.sqrt(max(float(grad @ cov3 @ grad), 0.0)))
    residuals: F64Array = tau - (best.t0c - rho_ns @ best.n)
    return FrontFit(
        n=best.n,
        t0_ns=t_ref + round(t0_rel),
        t0_sigma_ns=t0_sigma,
        t_ref_ns=t_ref,
        chi2=best.chi2,
        ndof=k - 3,
        residuals_ns=residuals,
        cov_rad2=cov2,
        tangent_basis=best.basis,
        err_deg=err_deg,
        ambiguous=bool(ambiguous),
        mirror_n=None if mirror is None else mirror.n,
    )


def front_radec(fit: FrontFit) -> tuple[float, float]:
    """ICRS (RA, Dec) in degrees of a fitted front's source direction at its time ``t0_ns``."""
    return ecef_unit_to_radec(fit.n, fit.t0_ns)


ELLIPSE_STEP_RAD = 1.0e-3
"""Step (rad) along the major axis by which its position angle is carried into ICRS."""


@dataclass(frozen=True, slots=True)
class ErrorEllipse:
    """The 1σ error ellipse of a fitted direction on the sky (ICRS).

    ``major_deg`` >= ``minor_deg``: the semi-axes, the square roots of the
    eigenvalues of the direction's covariance (deg). ``pa_deg`` in [0, 180): the
    position angle of the major axis, from north through east, as astronomers
    measure it (the ambiguity of 180 deg is the ellipse's own symmetry). The
    probability within the ellipse scaled by ``k`` is ``1 - exp(-k**2 / 2)``
    (39.3 % for ``k = 1``), where a circle of radius ``err_deg`` (the geometric
    mean of the semi-axes) holds less along the major axis.
    """

    major_deg: float
    minor_deg: float
    pa_deg: float


def error_ellipse(fit: FrontFit, radec: tuple[float, float] | None = None) -> ErrorEllipse:
    """The fit's 1σ error ellipse: semi-axes from ``cov_rad2``; the position angle
    from carrying a point a small step along the major axis (ECEF, at ``t0_ns``)
    into ICRS with the same transformation as the direction (so the rotation of
    the Earth, precession and nutation between the two frames are included).
    ``radec``: the direction's :func:`front_radec`, when the caller has it."""
    vals, vecs = np.linalg.eigh(fit.cov_rad2)  # ascending
    minor, major = (float(np.degrees(np.sqrt(max(v, 0.0)))) for v in vals)
    axis = fit.tangent_basis.T @ vecs[:, 1]  # ECEF unit vector along the major axis
    ra0, dec0 = front_radec(fit) if radec is None else radec
    ra1, dec1 = ecef_unit_to_radec(fit.n + ELLIPSE_STEP_RAD * axis, fit.t0_ns)
    return ErrorEllipse(major, minor, position_angle_deg(ra0, dec0, ra1, dec1) % 180.0)


def position_angle_deg(ra0: float, dec0: float, ra1: float, dec1: float) -> float:
    """Position angle (deg, from north through east, in [0, 360)) of the point
    (``ra1``, ``dec1``) seen from (``ra0``, ``dec0``), all in degrees."""
    a0, d0, a1, d1 = (math.radians(x) for x in (ra0, dec0, ra1, dec1))
    da = a1 - a0
    y = math.sin(da) * math.cos(d1)
    x = math.cos(d0) * math.sin(d1) - math.sin(d0) * math.cos(d1) * math.cos(da)
    return math.degrees(math.atan2(y, x)) % 360.0
