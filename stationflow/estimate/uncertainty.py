"""The error model: what each sensor's error is made of, learned from the data where not declared.

A sensor's error has two parts (JCGM 100:2008, the GUM, section 5.2 on
correlated input quantities, from memory: an error common to two readings
cancels in their difference):

- **reading noise** [unit]: random and independent from one report to the
  next.  It enters the value, the gradient and the tendency.  Unless declared
  (``uncertainty.sensor``), it is learned per station from the robust spread
  of the series' second differences: for white noise of standard deviation
  s, ``x[t-1] - 2 x[t] + x[t+1]`` has standard deviation ``sqrt(6) s``
  (median absolute value / 0.6745 estimates a normal standard deviation,
  Hampel 1974, from memory).  It is floored by the reported resolution q of the values
  (rounding error ``q / sqrt(12)``, GUM F.2.2.1) and by :data:`NOISE_FLOOR`.
- **offset** [unit]: a persistent calibration error, constant over a run.  It
  enters the value and the gradient (and so the advection) but cancels in a
  tendency.  Declared (``uncertainty.offset``, or the older
  ``uncertainty.calibration``) or the per-variable default :data:`DEFAULT_OFFSET`.

A third part is not a property of a sensor: **model error**, the departure
of the field from a plane at the scale of a cluster (curvature, cold pools,
fronts narrower than the station spacing, and offsets larger than declared).
:func:`curvature_bias` estimates it from the network itself: where clusters
share stations, their gradients would agree up to noise if the field were a
plane.  Their differences give the local curvature (and from it the plane's
bias at each cluster centre) and the station-scale structure no smooth field
explains; :func:`null_levels` says how much of either the declared sensor
errors make by chance, and :func:`model_variance` keeps the excess (Spencer
and Doswell 2001 compare neighbouring triangle estimates in the same spirit).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

#: smallest reading noise a learned estimate may take [variable unit] (a logger's last digit; common practice)
NOISE_FLOOR = {"air_temperature": 0.01, "potential_temperature": 0.01, "dew_point_temperature": 0.01,
               "relative_humidity": 0.1, "air_pressure": 1.0, "wind_speed": 0.05}
#: the same for concentrations and other user scalars [their unit]
NOISE_FLOOR_OTHER = 0.01
#: smallest learned noise of a wind component [m s-1] (a cup anemometer's resolution, common practice)
WIND_FLOOR = 0.1

#: default standard uncertainty of each sensor's persistent offset [variable unit], with its source
DEFAULT_OFFSET: dict[str, tuple[float, str]] = {
    "air_temperature": (0.1, "field-calibrated thermometers, common practice; WMO-No. 8 (2018) Annex 1.A gives 0.1 K "
                             "as the required and 0.2 K as the achievable uncertainty (from memory)"),
    "dew_point_temperature": (0.2, "common practice for capacitive hygrometers after calibration"),
    "relative_humidity": (2.0, "common practice (%); WMO-No. 8 achievable 1-3 % (from memory)"),
    "air_pressure": (15.0, "common practice (Pa); WMO-No. 8 achievable 0.15 hPa (from memory)"),
    "wind_speed": (0.3, "common practice (m s-1)"),
}
#: concentrations (PM2.5 and other user scalars): offset after co-location, in their unit (common practice)
DEFAULT_OFFSET_OTHER = (1.0, "common practice after a co-location calibration; EPA/600/R-20/280 allows intercepts "
                             "within +-5 ug m-3 (from memory)")
#: fewest second differences a station needs for its own noise estimate (else the network median)
MIN_DIFFERENCES = 10


#: default smallest rate that counts as a change [unit h-1], and the tendency error the window is sized for
DEFAULT_MIN_RATE = {"air_temperature": 0.25, "dew_point_temperature": 0.25, "relative_humidity": 1.0,
                    "air_pressure": 20.0, "wind_speed": 0.5}
#: the same for concentrations and other user scalars [unit h-1]
DEFAULT_MIN_RATE_OTHER = 1.0
#: longest window chosen from the data (a frost night changes within the hour; common practice)
MAX_AUTO_WINDOW_S = 3600.0


#: the canonical variable whose defaults a user scalar of each kind takes (concentrations and others: the *_OTHER)
KIND_DEFAULTS = {"temperature": "air_temperature", "humidity": "relative_humidity", "pressure": "air_pressure",
                 "speed": "wind_speed"}


def _as(variable: str, kind: str | None) -> str:
    """The name the defaults are looked up by: the variable's own, else its kind's canonical variable."""
    return variable if variable in DEFAULT_OFFSET or kind is None else KIND_DEFAULTS.get(kind, variable)


def default_min_rate(variable: str, kind: str | None = None) -> float:
    """Smallest rate that counts for ``variable`` (of ``kind``, see :func:`stationflow.variables.kind_of`) when
    ``budget.min_rate`` is not set [unit h-1] (common practice: frost staff act on cooling of 0.5-2 K/h; a
    0.25 K/h floor resolves them)."""
    return DEFAULT_MIN_RATE.get(_as(variable, kind), DEFAULT_MIN_RATE_OTHER)


def window_steps(value_noise_var: float, interval_s: float, target_se: float, *,
                 max_window_s: float = MAX_AUTO_WINDOW_S) -> int:
    """Half-window h [steps] so that the tendency's standard error is at most ``target_se`` [unit h-1].

    The centred difference over 2h steps has standard error
    ``sqrt(2 var) / (2 h dt)`` from reading noise alone (offsets cancel).
    At least 1 step; at most ``max_window_s`` (or one step each side when
    the interval itself is longer).
    """
    dt_h = interval_s / 3600.0
    if not (np.isfinite(value_noise_var) and target_se > 0):
        need = 1
    else:
        need = int(np.ceil(np.sqrt(2.0 * value_noise_var) / (2.0 * dt_h * target_se)))
    cap = max(1, int(np.floor(max_window_s / interval_s / 2.0 + 1e-9)))
    return int(min(max(need, 1), cap))


def default_offset(variable: str, kind: str | None = None) -> tuple[float, str]:
    """(offset standard uncertainty [unit], source) for ``variable`` (of ``kind``) when none is declared."""
    return DEFAULT_OFFSET.get(_as(variable, kind), DEFAULT_OFFSET_OTHER)


def noise_floor(variable: str, kind: str | None = None) -> float:
    """Smallest learned reading noise for ``variable`` (of ``kind``) [unit]."""
    return NOISE_FLOOR.get(variable, NOISE_FLOOR.get(_as(variable, kind), NOISE_FLOOR_OTHER))


#: reports the reading noise is learned from, at most (the first of the record)
NOISE_SAMPLE_ROWS = 2_000_000


def noise_sample_rows(time_ns: np.ndarray, *, limit: int = NOISE_SAMPLE_ROWS) -> slice:
    """The rows (a leading slice of rows in time order) that the reading noise is learned from.

    All rows up to ``limit``; beyond it the first ``limit`` rows, cut at a
    change of time so every station's last triple is whole (a 10,000-station
    network at 10-minute steps gives each station about 33 hours of reports).
    """
    n = len(time_ns)
    if n <= limit:
        return slice(0, n)
    cut = int(np.searchsorted(time_ns, time_ns[limit], side="left"))
    return slice(0, max(cut, 3))


def station_order(station: np.ndarray, time_ns: np.ndarray) -> np.ndarray:
    """Row order by station, then time (rows that come in time order need only a stable sort by station)."""
    if time_ns.size < 2 or bool(np.all(time_ns[1:] >= time_ns[:-1])):
        return np.argsort(station, kind="stable")
    return np.lexsort((time_ns, station))


def reading_noise(station: np.ndarray, time_ns: np.ndarray, values: np.ndarray, n_stations: int, *,
                  floor: float, order: np.ndarray | None = None, resolution: bool = True
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Reading noise per station from the robust spread of second differences.

    ``station`` (n,) integer codes 0..n_stations-1, ``time_ns`` (n,) int64,
    ``values`` (n,) with NaN where unusable; ``order``: :func:`station_order`
    of the rows, when already known.  Only triples of consecutive reports at
    equal spacing count.  Returns ``(noise, resolution, count)`` per station:
    noise [unit] (the network median where a station has fewer than
    :data:`MIN_DIFFERENCES` triples, ``floor`` where nothing is known), the
    resolution of the values (:func:`value_resolution`, the same for every
    station; 0 with ``resolution=False``) and the number of triples used.
    """
    order = station_order(station, time_ns) if order is None else order
    s, t, x = station[order], time_ns[order], values[order]
    ok = np.isfinite(x) & (s >= 0)
    s, t, x = s[ok], t[ok], x[ok]
    noise = np.full(n_stations, np.nan)
    res = value_resolution(x) if resolution else 0.0
    count = np.zeros(n_stations, int)
    if x.size >= 3:
        triple = (s[:-2] == s[1:-1]) & (s[1:-1] == s[2:]) & ((t[1:-1] - t[:-2]) == (t[2:] - t[1:-1]))
        d2 = np.abs(x[:-2] - 2 * x[1:-1] + x[2:])[triple]
        who = s[1:-1][triple]
        if d2.size:
            g = pd.Series(d2).groupby(who)
            med, cnt = g.median(), g.size()
            count[cnt.index.to_numpy()] = cnt.to_numpy()
            noise[med.index.to_numpy()] = med.to_numpy() / 0.6745 / np.sqrt(6.0)
    few = count < MIN_DIFFERENCES
    trusted = noise[~few]
    fallback = float(np.median(trusted)) if trusted.size else floor
    noise = np.where(few, fallback, noise)
    noise = np.fmax(noise, res / np.sqrt(12.0))
    return np.fmax(noise, floor), np.full(n_stations, res), count


#: values looked at to find the reporting resolution
SAMPLE_VALUES = 200_000


def value_resolution(values: np.ndarray, *, tolerance: float = 0.02) -> float:
    """The step of the grid the values are reported on (their resolution) [unit], or 0 for continuous values.

    The candidate is the greatest common divisor (Euclid's algorithm on
    floats) of the steps between distinct values; it is the resolution when
    every value lies on that grid (within ``tolerance`` of a step), as values
    rounded to 0.01 degF do after conversion to kelvin, even when a series
    never visits neighbouring grid points.
    """
    v = values[np.isfinite(values)]
    if v.size > SAMPLE_VALUES:  # a grid shows in any large sample of its values
        v = v[np.linspace(0, v.size - 1, SAMPLE_VALUES).astype(np.int64)]
    v = np.unique(v)
    if v.size < 3:
        return 0.0
    steps = np.unique(np.diff(v))
    scale = float(np.max(np.abs(v)))
    eps = 1e-9 * max(scale, 1.0)
    q = float(steps[0])
    for d in steps[1:64]:  # the smallest steps settle the divisor
        a, b = max(q, float(d)), min(q, float(d))
        while b > eps * 10:
            r = a % b
            a, b = b, (0.0 if r < eps * 10 or b - r < eps * 10 else r)
        q = a
        if q < 1e-6 * (v[-1] - v[0]):
            return 0.0  # no grid coarser than a millionth of the range: continuous values
    k = (v - v[0]) / q
    return q if np.all(np.abs(k - np.round(k)) <= tolerance) else 0.0


def cluster_pairs(members: list[np.ndarray], n_stations: int, *, shared: int = 2) -> np.ndarray:
    """(P, 2) index pairs of clusters that share at least ``shared`` stations (neighbouring triangles share an edge)."""
    from scipy.sparse import csr_matrix

    if not members:
        return np.zeros((0, 2), int)
    rows = np.concatenate([np.asarray(m) for m in members])
    cols = np.concatenate([np.full(len(m), j) for j, m in enumerate(members)])
    memb = csr_matrix((np.ones(rows.size), (rows, cols)), shape=(n_stations, len(members)))
    common = (memb.T @ memb).tocoo()
    keep = (common.row < common.col) & (common.data >= shared)
    return np.column_stack([common.row[keep], common.col[keep]])


@dataclass
class CurvatureGeometry:
    """What :func:`curvature_bias` needs that depends only on the network (computed once per run).

    ``pairs`` (P, 2) neighbouring clusters (sharing at least two stations);
    ``ends`` the sparse (C, P) incidence of pairs on clusters.  Everything
    from the pairs' gradient differences (dgx, dgy) to the bias and the
    residual differences is linear, so it is kept as sparse matrices:
    ``to_bias[q][k]`` (C, P) gives bias component q from difference
    component k, ``to_resid[q][k]`` (P, P) the residual difference q.
    """

    pairs: np.ndarray
    ends: object
    to_bias: list
    to_resid: list


def curvature_geometry(x: np.ndarray, y: np.ndarray, members: list[np.ndarray], n_stations: int) -> CurvatureGeometry:
    """Precompute :class:`CurvatureGeometry` for the clusters ``members`` of stations at ``x``, ``y`` [m].

    The Hessian near cluster c, ``H = (Hxx, Hxy, Hyy)``, is the least-squares
    fit of ``dG_p = H dc_p`` over the pairs p of c (dc the centroid
    separation): ``H = N^+ sum_p A_p^T dG_p`` with ``A_p = [[dx, dy, 0],
    [0, dx, dy]]``.  The bias map: a plane fitted through the values
    ``0.5 d_i^T H d_i`` of a quadratic field (``d_i`` each member's offset
    from the centroid) has gradient ``P q`` at the centroid, where the true
    gradient of the quadratic part is zero; P is the plane's (unweighted)
    gradient operator.
    """
    from scipy.sparse import csr_matrix, diags, identity

    n_c = len(members)
    pairs = cluster_pairs(members, n_stations)
    cx = np.array([x[np.asarray(m)].mean() for m in members])  # once per cluster and run
    cy = np.array([y[np.asarray(m)].mean() for m in members])
    i, j = pairs[:, 0], pairs[:, 1]
    n_p = len(pairs)
    dx = cx[j] - cx[i] if n_p else np.zeros(0)
    dy = cy[j] - cy[i] if n_p else np.zeros(0)
    rows, cols = np.concatenate([i, j]), np.tile(np.arange(n_p), 2)
    ends = csr_matrix((np.ones(2 * n_p), (rows, cols)), shape=(n_c, n_p))
    ata = np.stack([dx * dx, dx * dy, 0 * dx, dx * dy, dx * dx + dy * dy, dx * dy, 0 * dx, dx * dy, dy * dy], axis=1)
    normal = np.asarray(ends @ ata).reshape(n_c, 3, 3)
    ninv = np.linalg.pinv(normal, rcond=1e-6, hermitian=True) if n_c else np.zeros((0, 3, 3))
    bias_map = np.zeros((n_c, 2, 3))
    sizes = np.array([len(m) for m in members])
    for k in np.unique(sizes):  # a loop over cluster sizes, not over clusters or time
        sel = np.flatnonzero(sizes == k)
        M = np.stack([np.asarray(members[c]) for c in sel])
        ddx, ddy = x[M] - cx[sel, None], y[M] - cy[sel, None]
        A = np.stack([np.ones_like(ddx), ddx, ddy], axis=-1)
        P = np.linalg.pinv(A)[:, 1:3, :]  # (n, 2, k) gradient operator
        q = np.stack([0.5 * ddx * ddx, ddx * ddy, 0.5 * ddy * ddy], axis=-1)  # (n, k, 3)
        bias_map[sel] = P @ q
    # H[c, a] from the differences: coefficients of dgx_p and dgy_p for each incident pair (c, p)
    pdx, pdy = np.tile(dx, 2), np.tile(dy, 2)
    N = ninv[rows]  # (2P, 3, 3)
    hx = [N[:, a, 0] * pdx + N[:, a, 1] * pdy for a in range(3)]
    hy = [N[:, a, 1] * pdx + N[:, a, 2] * pdy for a in range(3)]

    def sparse(vals, shape=(n_c, n_p)):
        return csr_matrix((vals, (rows, cols)), shape=shape)

    bm = bias_map[rows]  # (2P, 2, 3)
    to_bias = [[sparse(sum(bm[:, q, a] * h[a] for a in range(3))) for h in (hx, hy)] for q in range(2)]
    # the pair's mean Hessian, and what it leaves of each difference
    half = 0.5 * ends.T.tocsr()  # (P, C)
    H = [[half @ sparse(h[a]) for h in (hx, hy)] for a in range(3)]  # H[a][k]: (P, P)
    Dx, Dy, eye = diags(dx), diags(dy), identity(n_p, format="csr")
    to_resid = [
        [(eye - Dx @ H[0][0] - Dy @ H[1][0]).tocsr(), (-(Dx @ H[0][1]) - Dy @ H[1][1]).tocsr()],
        [(-(Dx @ H[1][0]) - Dy @ H[2][0]).tocsr(), (eye - Dx @ H[1][1] - Dy @ H[2][1]).tocsr()],
    ]
    return CurvatureGeometry(pairs, ends, to_bias, to_resid)


def curvature_bias(gx: np.ndarray, gy: np.ndarray, geom: CurvatureGeometry, steps: int
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """What the neighbouring clusters' gradients say about each cluster's departure from a plane (raw).

    Differences of neighbouring gradients are first averaged over ``2 steps
    + 1`` times (curvature persists, reading noise averages out).  Two parts:

    - smooth curvature: the Hessian near each cluster is the least-squares
      fit of ``dG = H dc`` over its pairs (gradient differences against
      centroid separations); the plane's gradient at the centre is then off
      by ``bias_map @ H`` (returned as bias_x, bias_y);
    - structure at the station scale that no smooth field explains (a cold
      pocket, an offset larger than declared): half the mean square of the
      pairs' differences left after the fitted curvature, per component,
      averaged over the cluster's pairs and over time.

    Both include what the sensor errors alone produce; :func:`null_levels`
    gives that part, to be subtracted (:func:`model_variance`).  Arrays are
    (time, cluster); zero where a cluster has no neighbour.
    """
    from .budget import window_mean

    n_t, n_c = gx.shape
    if geom.pairs.size == 0:
        zero = np.zeros((n_t, n_c))
        return zero, zero.copy(), zero.copy()
    i, j = geom.pairs[:, 0], geom.pairs[:, 1]
    if steps:  # smoothing the gradients smooths their differences (a linear map)
        gx, gy = window_mean(gx, steps, min_weight=0.0), window_mean(gy, steps, min_weight=0.0)
    dgx = np.nan_to_num(gx[:, j] - gx[:, i]).T  # (P, T)
    dgy = np.nan_to_num(gy[:, j] - gy[:, i]).T
    (bxx, bxy), (byx, byy) = geom.to_bias
    bias_x = np.ascontiguousarray((bxx @ dgx + bxy @ dgy).T)
    bias_y = np.ascontiguousarray((byx @ dgx + byy @ dgy).T)
    (rxx, rxy), (ryx, ryy) = geom.to_resid
    rx = rxx @ dgx + rxy @ dgy
    ry = ryx @ dgx + ryy @ dgy
    square = 0.25 * (rx * rx + ry * ry)  # per component, shared between the two clusters of the pair
    count = np.asarray(geom.ends.sum(axis=1)).ravel()[:, None]
    structure = np.ascontiguousarray((np.asarray(geom.ends @ square) / np.maximum(count, 1)).T)
    if steps:
        structure = np.nan_to_num(window_mean(structure, steps, min_weight=0.0))
    return bias_x, bias_y, structure


#: realisations of the sensor errors used for the null levels of the model error
NULL_DRAWS = 200
#: the share of those realisations a model-error part must exceed to count (a 5 % test)
NULL_QUANTILE = 0.95


def null_levels(x: np.ndarray, y: np.ndarray, members: list[np.ndarray], geom: CurvatureGeometry, *,
                noise: np.ndarray, offset: float, steps: int, seed: int = 20261204) -> tuple[np.ndarray, np.ndarray]:
    """Levels of squared curvature bias and of structure that sensor errors alone rarely exceed, per cluster.

    A Monte Carlo over :data:`NULL_DRAWS` realisations of a flat field read
    by sensors with the error model's offsets (persistent) and reading noise
    (divided by the number of times averaged, ``2 steps + 1``): each
    realisation is one "time" of :func:`curvature_bias` without smoothing.
    Deterministic (fixed seed), so every time partition subtracts the same.
    """
    from .planes import fit_planes

    n_s = len(noise)
    rng = np.random.default_rng(seed)
    draws = (rng.standard_normal((NULL_DRAWS, n_s)) * offset
             + rng.standard_normal((NULL_DRAWS, n_s)) * (noise / np.sqrt(2 * steps + 1))[None, :])
    total = np.sqrt(noise ** 2 + offset ** 2)
    b2_parts, structure_parts = [], []
    for start in range(0, NULL_DRAWS, 50):  # in blocks of draws: bounded intermediates on large networks
        fit = fit_planes(draws[start:start + 50], x, y, members, sigma=total, residuals=False)
        bx, by, structure = curvature_bias(fit.grad_x, fit.grad_y, geom, 0)
        b2_parts.append((0.5 * (bx * bx + by * by)).astype(np.float32))
        structure_parts.append(structure.astype(np.float32))
        del fit, bx, by, structure
    b2 = np.nanquantile(np.concatenate(b2_parts), NULL_QUANTILE, axis=0)
    return (np.nan_to_num(b2).astype(float),
            np.nan_to_num(np.nanquantile(np.concatenate(structure_parts), NULL_QUANTILE, axis=0)).astype(float))


def model_variance(bias_x: np.ndarray, bias_y: np.ndarray, structure: np.ndarray, null_b2: np.ndarray,
                   null_structure: np.ndarray) -> np.ndarray:
    """Model-error variance of one gradient component: each part above what the sensor errors explain, or 0."""
    curvature = np.fmax(0.5 * (bias_x * bias_x + bias_y * bias_y) - null_b2[None, :], 0.0)
    return curvature + np.fmax(structure - null_structure[None, :], 0.0)
