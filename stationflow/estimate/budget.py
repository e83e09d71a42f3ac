"""The budget: tendency = advection + residual, with uncertainties and a regime.

For each usable cluster and analysis time (REFERENCES 2.1):

- the scalar's plane is fitted (``planes.fit_planes``) giving the centre
  value ``a(t)`` and the gradient;
- the cluster wind is the mean of the member stations' winds (grid axes);
  stations without wind fall back to the network-mean wind;
- advection ``A(t) = -(u dT/dx + v dT/dy)``;
- the tendency is the centred difference ``(a(t+h) - a(t-h)) / 2h`` over
  the configured window ``2h``; the advection is averaged over the same
  window with trapezoid weights, so that ``tendency - mean(A)`` is the window
  mean of the in-situ part (the residual);
- standard errors by first-order propagation: gradient covariance and wind
  error for A, ``var(A) = V^T S_grad V + grad^T S_V grad`` (REFERENCES 1.3),
  intercept errors for the tendency.  The error model
  (:mod:`stationflow.estimate.uncertainty`): reading noise is independent between
  time steps (it averages down over the window and enters the tendency);
  sensor offsets and the model error (the field is not a plane) persist
  (they do not average down, and offsets cancel in the tendency);
- the regime: which terms exceed ``significance`` standard errors (and
  ``min_rate``), and the advective share ``|A| / (|A| + |R|)``; a
  significant change is never steady; implausible splits (large parts that
  cancel) are undetermined.

Every rate is in the variable's unit per hour; gradients in unit per km.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .planes import PlaneFit, fit_planes
from .uncertainty import curvature_bias, curvature_geometry, model_variance, null_levels

log = logging.getLogger(__name__)

REGIMES = ("advective", "in_situ", "mixed", "steady", "undetermined")
ERROR_MODELS = ("prior", "posterior", "larger")


@dataclass
class BudgetSettings:
    """Settings of :func:`compute_budget` (from the ``[budget]`` and ``[uncertainty]`` tables).

    The error model (see :mod:`stationflow.estimate.uncertainty`): ``sigma`` is each
    sensor's reading noise (scalar or per station; independent in time),
    ``offset`` the standard uncertainty of each sensor's persistent offset
    (enters values and gradients, cancels in tendencies).
    """

    sigma: float | np.ndarray = 0.2  # reading noise of one reading [unit], scalar or per station
    wind_sigma: float = 0.5  # standard uncertainty of u and v [m s-1]
    offset: float = 0.0  # persistent per-sensor offset uncertainty [unit]
    error_model: str = "larger"
    half_window: int = 1  # h, in analysis intervals
    interval_s: float = 600.0
    min_stations: int = 3
    significance: float = 2.0
    dominance: float = 0.67
    min_rate: float = 0.0  # [unit h-1]
    vertical_regression: bool = False
    model_error: bool = True  # add the model error (the field is not a plane; estimate.uncertainty) to gradient variances
    model_half_window: int = 0  # smoothing of the model error, steps each side (0: automatic, see model_steps)
    #: what the model error needs that depends only on the network (computed once per run by the pipeline;
    #: computed here when None): (CurvatureGeometry, null level of the curvature part, of the structure part)
    model_network: tuple | None = None

    @property
    def model_steps(self) -> int:
        """Half-width [steps] of the model error's smoothing: the tendency's half window, at least 3 steps (long
        enough that reading noise averages out of the gradient differences, short enough to follow a passing
        front: measured with the coverage suite, docs/method.md)."""
        if self.model_half_window > 0:
            return int(self.model_half_window)
        return max(int(self.half_window), 3)


def cluster_mean(values: np.ndarray, membership, *, fallback: bool = True, variance: bool = True,
                 counts: tuple[np.ndarray, np.ndarray] | None = None
                 ) -> tuple[np.ndarray, np.ndarray | None, np.ndarray]:
    """Mean, sample variance and count of member values per cluster.

    ``values`` (n_times, n_stations) with NaN for missing; ``membership`` a
    sparse (n_stations, n_clusters) 0/1 matrix.  Where a cluster has no
    member value and ``fallback`` is set, the network mean is used (and the
    count is reported as 0).  ``variance=False`` skips the variance (None).
    ``counts``: ``(finite mask, count)`` of an earlier call on values
    missing in exactly the same places (u and v), reused when the masks agree.
    """
    ok = np.isfinite(values)
    # the sparse products come out cluster-major: made time-major (C order) once here, like the plane fits,
    # so that the budget arithmetic and the file columns read every array in memory order
    tm = np.ascontiguousarray
    if counts is not None and np.array_equal(counts[0], ok):
        n = counts[1]
    else:
        n = tm((membership.T @ ok.T.astype(float)).T)
    v0 = np.where(ok, values, 0.0)
    s = tm((membership.T @ v0.T).T)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = s / n
    var = None
    if variance:
        s2 = tm((membership.T @ (v0 * v0).T).T)
        with np.errstate(invalid="ignore", divide="ignore"):
            var = np.where(n > 1, (s2 - n * mean * mean) / np.maximum(n - 1, 1), np.nan)
    if fallback:
        net, net_var = row_mean_var(values)
        missing = n == 0
        mean = np.where(missing, net[:, None], mean)
        if variance:
            var = np.where(missing, net_var[:, None], var)
    return mean, None if var is None else np.maximum(var, 0.0), n


def row_mean_var(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean and sample variance (ddof 1) of the finite values of each row; NaN where too few.

    As ``np.nanmean`` and ``np.nanvar(ddof=1)``, without their warnings for
    empty rows (``warnings.catch_warnings`` is not safe on threads).
    """
    ok = np.isfinite(values)
    v0 = np.where(ok, values, 0.0)
    cnt = ok.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = v0.sum(axis=1) / cnt
        dev = np.where(ok, values - mean[:, None], 0.0)
        var = np.where(cnt > 1, (dev * dev).sum(axis=1) / (cnt - 1), np.nan)
    return np.where(cnt > 0, mean, np.nan), var


def membership_matrix(members: list[np.ndarray], n_stations: int):
    """Sparse (n_stations, n_clusters) 0/1 matrix of cluster membership."""
    from scipy.sparse import csr_matrix

    rows = np.concatenate([np.asarray(m) for m in members]) if members else np.zeros(0, int)
    cols = np.concatenate([np.full(len(m), j) for j, m in enumerate(members)]) if members else np.zeros(0, int)
    return csr_matrix((np.ones(rows.size), (rows, cols)), shape=(n_stations, len(members)))


def _window_sums(a: np.ndarray, h: int, power: int, *, weights: np.ndarray | None = None
                 ) -> tuple[np.ndarray, np.ndarray, float]:
    """Sums of ``w**power * a`` and of ``w`` over the present samples of each centred window.

    ``weights``: the sums of ``w`` from an earlier call on an array missing in
    the same places (not summed again).
    """
    w_full = np.ones(2 * h + 1)
    w_full[0] = w_full[-1] = 0.5
    acc = np.zeros_like(a)
    wsum = np.zeros_like(a) if weights is None else weights
    n = a.shape[0]
    present = np.isfinite(a)
    a0 = np.where(present, a, 0.0)  # missing samples add nothing (the same sums as masking each offset)
    present = present.astype(a.dtype)
    tmp = np.empty_like(a)
    for j, w in zip(range(-h, h + 1), w_full):  # loop over the window's offsets, not over time
        m = max(0, n - abs(j))  # samples that have a partner at this offset
        src = slice(max(0, j), max(0, j) + m)
        dst = slice(max(0, -j), max(0, -j) + m)
        t = tmp[:m]
        np.multiply(a0[src], w ** power, out=t)
        acc[dst] += t
        if weights is None:
            np.multiply(present[src], w, out=t)
            wsum[dst] += t
    return acc, wsum, float(w_full.sum())


def window_mean(a: np.ndarray, h: int, *, min_weight: float = 2.0 / 3.0) -> np.ndarray:
    """Trapezoid-weighted centred mean over ``t-h .. t+h`` along axis 0.

    Missing samples are left out and the weights renormalised; at least
    ``min_weight`` of the total weight must be present, else NaN.
    """
    acc, wsum, total = _window_sums(a, h, 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(wsum >= min_weight * total, acc / wsum, np.nan)


def window_sum_sq_weights(var: np.ndarray, h: int, *, min_weight: float = 2.0 / 3.0) -> np.ndarray:
    """Variance of :func:`window_mean` for independent samples: sum(w_i^2 var_i) / (sum w_i)^2."""
    acc, wsum, total = _window_sums(var, h, 2)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(wsum >= min_weight * total, acc / wsum ** 2, np.nan)


def window_mean_and_variance(a: np.ndarray, var: np.ndarray, h: int, *, min_weight: float = 2.0 / 3.0
                             ) -> tuple[np.ndarray, np.ndarray]:
    """:func:`window_mean` of ``a`` and :func:`window_sum_sq_weights` of ``var`` (the same numbers),
    summing the window weights once when both are missing in the same places."""
    acc, wsum, total = _window_sums(a, h, 1)
    shared = wsum if np.array_equal(np.isfinite(a), np.isfinite(var)) else None
    acc2, wsum2, _ = _window_sums(var, h, 2, weights=shared)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(wsum >= min_weight * total, acc / wsum, np.nan)
        variance = np.where(wsum2 >= min_weight * total, acc2 / wsum2 ** 2, np.nan)
    return mean, variance


def _gap_plan(ok: np.ndarray, max_gap: int):
    """Where :func:`fill_short_gaps` fills and from which neighbours: ``(rows, cols, prev, next)`` or None."""
    n = ok.shape[0]
    idx = np.arange(n).reshape((n,) + (1,) * (ok.ndim - 1))
    prev = np.maximum.accumulate(np.where(ok, idx, -1), axis=0)
    nxt = np.flip(np.minimum.accumulate(np.flip(np.where(ok, idx, n), axis=0), axis=0), axis=0)
    fill = ~ok & (prev >= 0) & (nxt < n) & (nxt - prev - 1 <= max_gap)
    where = np.nonzero(fill)
    if where[0].size == 0:
        return None
    return where, prev[where], nxt[where]


def _apply_gap_plan(a: np.ndarray, plan) -> np.ndarray:
    if plan is None:
        return a
    where, p, q = plan
    rest = where[1:]
    ap, aq = a[(p,) + rest], a[(q,) + rest]
    w = (where[0] - p) / np.maximum(q - p, 1)
    out = a.copy()
    out[where] = ap + w * (aq - ap)
    return out


def fill_short_gaps_like(arrays: list[np.ndarray], max_gap: int) -> list[np.ndarray]:
    """:func:`fill_short_gaps` of each array; the gaps are found once when all are missing in the same places."""
    if max_gap < 1 or not arrays:
        return list(arrays)
    ok = np.isfinite(arrays[0])
    plan = _gap_plan(ok, max_gap)
    return [_apply_gap_plan(a, plan) if np.array_equal(np.isfinite(a), ok) else fill_short_gaps(a, max_gap)
            for a in arrays]


def fill_short_gaps(a: np.ndarray, max_gap: int) -> np.ndarray:
    """Linearly interpolate along axis 0 across runs of at most ``max_gap`` missing steps.

    Leading and trailing gaps and longer gaps stay NaN.  Vectorised over
    the other axes.
    """
    if max_gap < 1:
        return a
    return _apply_gap_plan(a, _gap_plan(np.isfinite(a), max_gap))


def shift(a: np.ndarray, k: int) -> np.ndarray:
    """``out[t] = a[t + k]`` along axis 0, NaN outside."""
    out = np.full_like(a, np.nan)
    n = a.shape[0]
    if k >= 0:
        out[: n - k] = a[k:]
    else:
        out[-k:] = a[: n + k]
    return out


def classify(tendency: np.ndarray, advection: np.ndarray, residual: np.ndarray, advection_se: np.ndarray,
             residual_se: np.ndarray, *, significance: float = 2.0, dominance: float = 0.67,
             min_rate: float = 0.0, tendency_se: np.ndarray | None = None) -> np.ndarray:
    """Regime per element: advective, in_situ, mixed, steady or undetermined.

    A term is significant when ``|term| > max(significance * se, min_rate)``.
    Both significant: the advective share ``f = |A| / (|A| + |R|)`` decides
    (``f >= dominance`` advective, ``f <= 1 - dominance`` in situ, else
    mixed).  One significant: that one, if it is also the larger; else mixed.
    Neither: steady (too small to tell) - unless the tendency itself is
    significant (with ``tendency_se``): then the change goes to one part when
    the other's bound ``|term| + significance * se`` is below
    ``(1 - dominance)`` of it (in calm air the advection's bound is small), and
    is undetermined otherwise.  Any term missing: undetermined.
    """
    return np.asarray(REGIMES, dtype=object)[classify_codes(
        tendency, advection, residual, advection_se, residual_se, significance=significance, dominance=dominance,
        min_rate=min_rate, tendency_se=tendency_se)]


def classify_codes(tendency: np.ndarray, advection: np.ndarray, residual: np.ndarray, advection_se: np.ndarray,
                   residual_se: np.ndarray, *, significance: float = 2.0, dominance: float = 0.67,
                   min_rate: float = 0.0, tendency_se: np.ndarray | None = None) -> np.ndarray:
    """:func:`classify` as int8 codes into :data:`REGIMES` (compact for large runs)."""
    a, r = np.abs(advection), np.abs(residual)
    with np.errstate(invalid="ignore", divide="ignore"):
        sig_a = a > np.fmax(significance * advection_se, min_rate)
        sig_r = r > np.fmax(significance * residual_se, min_rate)
        share = a / (a + r)
    adv, ins, mix, steady, undet = range(len(REGIMES))
    both = sig_a & sig_r
    out = np.full(np.shape(tendency), steady, dtype=np.int8)
    out[both & (share >= dominance)] = adv
    out[both & (share <= 1 - dominance)] = ins
    out[both & (share > 1 - dominance) & (share < dominance)] = mix
    only_a = sig_a & ~sig_r
    only_r = sig_r & ~sig_a
    out[only_a] = np.where(share[only_a] >= 0.5, adv, mix)
    out[only_r] = np.where(share[only_r] <= 0.5, ins, mix)
    if tendency_se is not None:
        # a clearly significant change is never 'steady': when neither part is significant on its own, the
        # bound of one part (|term| + significance * se) below (1 - dominance) of the change gives the change
        # to the other; otherwise the split cannot be told
        t = np.abs(tendency)
        with np.errstate(invalid="ignore"):
            sig_t = t > np.fmax(significance * tendency_se, min_rate)
            neither = sig_t & ~sig_a & ~sig_r
            a_small = a + significance * advection_se < (1 - dominance) * t
            r_small = r + significance * residual_se < (1 - dominance) * t
        out[neither] = undet
        out[neither & a_small] = ins
        out[neither & r_small] = adv
    undetermined = ~(np.isfinite(tendency) & np.isfinite(advection) & np.isfinite(advection_se) & np.isfinite(residual_se))
    out[undetermined] = undet
    return out


#: a split is implausible when both parts exceed this many times the change ...
IMPLAUSIBLE_RATIO = 5.0
#: ... and this many times min_rate (2.5 K/h for temperature by default): large parts that cancel
IMPLAUSIBLE_RATE = 10.0


def implausible(tendency: np.ndarray, advection: np.ndarray, residual: np.ndarray, *, min_rate: float,
                advection_se: np.ndarray | None = None, residual_se: np.ndarray | None = None,
                significance: float = 2.0) -> np.ndarray:
    """Rows whose advected and in-situ parts are each far larger than the change and cancel (a guard).

    Such a split comes from a gradient the plane cannot have (a height
    difference posing as a horizontal gradient, a broken sensor): true
    when ``|A|`` and ``|R|`` both exceed :data:`IMPLAUSIBLE_RATIO` x
    ``|tendency|`` and :data:`IMPLAUSIBLE_RATE` x ``min_rate`` (common
    practice) and, with their standard errors, each is significant (a large
    pair within its errors of zero is only uncertain, and the regime already
    says so).  Those rows are labelled undetermined and kept out of the
    main periods.
    """
    floor = IMPLAUSIBLE_RATE * min_rate if min_rate > 0 else 0.0
    a, r, t = np.abs(advection), np.abs(residual), np.abs(tendency)
    with np.errstate(invalid="ignore"):
        out = (a > IMPLAUSIBLE_RATIO * t) & (r > IMPLAUSIBLE_RATIO * t) & (a > floor) & (r > floor)
        if advection_se is not None and residual_se is not None:
            out &= (a > significance * advection_se) & (r > significance * residual_se)
    return out


def compute_budget(
    values: np.ndarray,
    u: np.ndarray,
    v: np.ndarray,
    x: np.ndarray,
    y: np.ndarray,
    members: list[np.ndarray],
    settings: BudgetSettings,
    *,
    z: np.ndarray | None = None,
    wind_speed: np.ndarray | None = None,
    fit: PlaneFit | None = None,
    lapse: tuple[np.ndarray, np.ndarray, np.ndarray, float] | None = None,
) -> dict[str, np.ndarray]:
    """Budget terms per (time, cluster) from gridded values and winds.

    Parameters
    ----------
    values
        (n_times, n_stations) of the budgeted quantity [unit], NaN where not good.
    u, v
        (n_times, n_stations) wind in *grid* axes [m s-1], NaN where missing.
    x, y
        Station grid coordinates [m]; ``z`` elevations [m] when
        ``settings.vertical_regression``.
    members
        Station indices per cluster.
    fit
        A precomputed plane fit of ``values`` (to share work); else fitted here.
    lapse
        ``(gamma, gamma_var, gamma_var_noise, z_ref)`` when a measured
        vertical gradient gamma(t) [unit m-1] (variance, and its part from
        reading noise alone [unit2 m-2]) was removed from
        ``values`` as ``gamma (z - z_ref)`` before the fit: the cluster value
        is put back at the members' mean height and the gamma error is
        carried into values and gradients (needs ``z``).

    Returns a dict of (n_times, n_clusters) arrays: value, tendency,
    advection, residual and their standard errors [unit h-1], grad_x,
    grad_y [unit km-1] and errors, u, v [m s-1] and errors, n_used, dof,
    rms, regime (int8 codes into :data:`REGIMES`), divergence and vorticity [s-1] with errors (plane fits of u
    and v over the same clusters), model_error [unit km-1], implausible (bool), and (with regression or a
    measured lapse) vertical_gradient [unit per 100 m].
    """
    s = settings
    n_s = values.shape[1]
    noise = np.broadcast_to(np.asarray(s.sigma, float), (n_s,))
    total = np.sqrt(noise ** 2 + s.offset ** 2)
    if fit is None:
        fit = fit_planes(values, x, y, members, z=z if s.vertical_regression else None, sigma=total, noise=noise,
                         min_stations=s.min_stations, residuals=True)
    if s.error_model not in ERROR_MODELS:
        raise ValueError(f"error_model must be one of {ERROR_MODELS}")
    h = max(1, int(s.half_window))
    memb = membership_matrix(members, n_s)
    g = _gradients(fit, s, (x, y, z, members), noise, lapse)
    w = _cluster_wind(u, v, memb, s.wind_sigma)
    adv, var_noise, var_persist = _advection(g, w)
    var_adv = var_noise + var_persist
    t = _tendency(fit, g, memb, h, s.interval_s, lapse)
    adv_mean, adv_var_noise = window_mean_and_variance(adv, var_noise, h)
    adv_var = adv_var_noise + window_mean(var_persist, h)
    residual = t.tendency - adv_mean
    res_var = t.variance + adv_var
    out = {
        "value": t.value, "value_se": np.sqrt(t.value_var),
        "tendency": t.tendency, "tendency_se": np.sqrt(t.variance),
        "advection": adv_mean, "advection_se": np.sqrt(adv_var),
        "residual": residual, "residual_se": np.sqrt(res_var),
        "advection_instant": adv, "advection_instant_se": np.sqrt(var_adv),
        "grad_x": g.gx * 1000.0, "grad_y": g.gy * 1000.0,
        "grad_x_se": np.sqrt(g.vx + g.model_var) * 1000.0, "grad_y_se": np.sqrt(g.vy + g.model_var) * 1000.0,
        "model_error": np.sqrt(g.model_var) * 1000.0,
        "u": w.u, "v": w.v, "u_se": np.sqrt(w.se2_u), "v_se": np.sqrt(w.se2_v),
        "n_used": fit.n_used, "n_wind": w.n.astype(np.int32), "dof": fit.dof,
        "rms": fit.rms if fit.rms is not None else np.full_like(g.gx, np.nan),
        "cond": fit.cond,
        "gap_filled": t.filled,
    }
    _extras(out, fit, g.scale, lapse, wind_speed, memb)
    if np.isfinite(u).any():
        from .kinematics import fit_wind, kinematics

        kin = kinematics(fit_wind(u, v, x, y, members, sigma=s.wind_sigma, min_stations=s.min_stations,
                                  residuals=False),
                         deformation=False)  # the budget reports divergence and vorticity only
        for name in ("divergence", "divergence_se", "vorticity", "vorticity_se"):
            out[name] = kin[name]
    _label(out, s)
    return out


def _advection(g: "_Gradients", w: "_Wind") -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Instantaneous advection [unit h-1] and the two parts of its variance: errors independent in time
    (reading noise, wind), which average down over the window, and persistent ones (offsets, model
    error), which do not."""
    hour = 3600.0
    adv = -(w.u * g.gx + w.v * g.gy) * hour
    var_noise = (w.u * w.u * g.vxn + w.v * w.v * g.vyn + 2 * w.u * w.v * g.cxyn + g.gx * g.gx * w.se2_u
                 + g.gy * g.gy * w.se2_v) * hour ** 2
    var_persist = (w.u * w.u * (g.vx - g.vxn + g.model_var) + w.v * w.v * (g.vy - g.vyn + g.model_var)
                   + 2 * w.u * w.v * (g.cxy - g.cxyn)) * hour ** 2
    return adv, var_noise, var_persist


def _label(out: dict, s: BudgetSettings) -> None:
    """The regime of every row, and the implausible splits (labelled undetermined)."""
    out["regime"] = classify_codes(out["tendency"], out["advection"], out["residual"], out["advection_se"],
                                   out["residual_se"], significance=s.significance, dominance=s.dominance,
                                   min_rate=s.min_rate, tendency_se=out["tendency_se"])
    out["implausible"] = implausible(out["tendency"], out["advection"], out["residual"], min_rate=s.min_rate,
                                     advection_se=out["advection_se"], residual_se=out["residual_se"],
                                     significance=s.significance)
    out["regime"][out["implausible"]] = np.int8(REGIMES.index("undetermined"))


@dataclass
class _Gradients:
    """Gradients with their covariances: the whole and the reading-noise part, plus the model error."""

    gx: np.ndarray
    gy: np.ndarray
    vx: np.ndarray
    vy: np.ndarray
    cxy: np.ndarray
    vxn: np.ndarray
    vyn: np.ndarray
    cxyn: np.ndarray
    va: np.ndarray  # the centre value's variance, and its noise part
    van: np.ndarray
    model_var: np.ndarray
    scale: np.ndarray  # the error model's factor on the prior variances
    dz: np.ndarray | None  # with a measured lapse: each cluster's mean height above the reference


def _gradients(fit: PlaneFit, s: BudgetSettings, geometry: tuple, noise: np.ndarray, lapse) -> _Gradients:
    """The gradients' error budget: prior covariances (whole and noise part), the measured lapse's error
    carried through the terrain gradient, and the model error (``geometry``: x, y, z, members)."""
    x, y, z, members = geometry
    scale = fit.error_scale(s.error_model)
    # prior covariances: the whole (noise + offsets) and the reading-noise part alone
    vx, vy, cxy, va = fit.var_x, fit.var_y, fit.cov_xy, fit.var_value
    if fit.noise_part("var_x") is not None:
        vxn, vyn, cxyn, van = (fit.noise_part(k) for k in ("var_x", "var_y", "cov_xy", "var_value"))
    else:  # a fit made without the noise split: all of it is noise
        vxn, vyn, cxyn, van = vx, vy, cxy, va
    gx, gy = fit.grad_x, fit.grad_y
    dz = None
    if lapse is not None:  # a measured vertical gradient was removed before the fit: its error, and the value back
        gamma, gamma_var, gamma_var_noise, z_ref = lapse
        dz, zx, zy = _cluster_terrain(x, y, z, members, z_ref)
        gv, gn = gamma_var[:, None], gamma_var_noise[:, None]
        vx, vy, cxy = vx + zx * zx * gv, vy + zy * zy * gv, cxy + zx * zy * gv
        vxn, vyn, cxyn = vxn + zx * zx * gn, vyn + zy * zy * gn, cxyn + zx * zy * gn
        # (the value needs nothing: the gamma error that enters the intercept, d_gamma (mean z - z_ref), is
        # taken out again when gamma (mean z - z_ref) is added back)
    # model error: the departure from a plane, persistent in time (from the neighbouring clusters; the
    # chi-square excess where dof > 0; the larger counts)
    model_var = np.zeros_like(gx)
    if s.model_error:
        geom, null_b2, null_structure = s.model_network or model_network(x, y, members, noise, s)
        bx, by, structure = curvature_bias(gx, gy, geom, s.model_steps)
        model_var = model_variance(bx, by, structure, null_b2, null_structure)
    excess = (scale - 1.0) * 0.5 * (vx + vy)  # chi-square above 1: what the residuals show beyond the noise
    model_var = np.fmax(model_var, np.where(np.isfinite(excess), excess, 0.0))
    return _Gradients(gx, gy, vx, vy, cxy, vxn, vyn, cxyn, va, van, model_var, scale, dz)


@dataclass
class _Wind:
    """Cluster-mean wind components with their squared standard errors and the members with wind."""

    u: np.ndarray
    v: np.ndarray
    se2_u: np.ndarray
    se2_v: np.ndarray
    n: np.ndarray


def _cluster_wind(u: np.ndarray, v: np.ndarray, memb, wind_sigma: float) -> _Wind:
    """The mean of the member stations' winds; where no member has wind, the network mean stands in (its
    error is then the spatial spread)."""
    um, uvar, n_w = cluster_mean(u, memb)
    vm, vvar, _ = cluster_mean(v, memb, counts=(np.isfinite(u), n_w))
    nw = np.maximum(n_w, 1)
    se2_u = np.fmax(wind_sigma ** 2, np.nan_to_num(uvar)) / nw
    se2_v = np.fmax(wind_sigma ** 2, np.nan_to_num(vvar)) / nw
    se2_u = np.where(n_w == 0, wind_sigma ** 2 + np.nan_to_num(uvar), se2_u)
    se2_v = np.where(n_w == 0, wind_sigma ** 2 + np.nan_to_num(vvar), se2_v)
    return _Wind(um, vm, se2_u, se2_v, n_w)


@dataclass
class _Tendency:
    """The centred tendency [unit h-1] and its variance, and the centre value with short gaps bridged."""

    tendency: np.ndarray
    variance: np.ndarray
    value: np.ndarray
    value_var: np.ndarray
    filled: np.ndarray  # value interpolated across a short gap


def _tendency(fit: PlaneFit, g: _Gradients, memb, h: int, interval_s: float, lapse) -> _Tendency:
    """Centred difference of the centre value over ``2 h`` steps; offsets cancel where the same stations
    were used at both ends (else they count too)."""
    hour = 3600.0
    span = 2 * h * interval_s
    # bridge short gaps (a station missing for a step or two) so one gap does not void a whole window
    gap = max(1, h // 2)
    value = fit.value if lapse is None else fit.value + lapse[0][:, None] * g.dz
    value, va, van = fill_short_gaps_like([value, g.va, g.van], gap)
    filled = ~np.isfinite(fit.value) & np.isfinite(value)
    a_plus, a_minus = shift(value, h), shift(value, -h)
    tendency = (a_plus - a_minus) / span * hour
    sizes = np.asarray(memb.sum(axis=0))  # (1, n_clusters)
    complete = (fit.n_used == sizes).astype(float)
    same = ((shift(fit.pattern.astype(float), h) == shift(fit.pattern.astype(float), -h))
            | ((shift(complete, h) == 1.0) & (shift(complete, -h) == 1.0)))
    end_var = van + np.where(same, 0.0, 1.0) * (va - van)
    tendency_var = (shift(end_var, h) + shift(end_var, -h)) / span ** 2 * hour ** 2
    return _Tendency(tendency, tendency_var, value, va, filled)


def _extras(out: dict, fit: PlaneFit, scale: np.ndarray, lapse, wind_speed: np.ndarray | None, memb) -> None:
    """The vertical gradient (fitted or measured) and the scalar mean wind speed, where known."""
    shape = fit.grad_x.shape
    if fit.grad_z is not None:
        out["vertical_gradient"] = fit.grad_z * 100.0
        out["vertical_gradient_se"] = np.sqrt(fit.var_z * scale) * 100.0
    elif lapse is not None:
        out["vertical_gradient"] = np.broadcast_to(lapse[0][:, None] * 100.0, shape).copy()
        out["vertical_gradient_se"] = np.broadcast_to(np.sqrt(lapse[1])[:, None] * 100.0, shape).copy()
    if wind_speed is not None:
        sp, _, _ = cluster_mean(wind_speed, memb, variance=False)
        out["wind_speed"] = sp


def model_network(x: np.ndarray, y: np.ndarray, members: list[np.ndarray], noise: np.ndarray,
                  settings: BudgetSettings) -> tuple:
    """(geometry, null curvature level, null structure level) of the model error for a network (once per run)."""
    geom = curvature_geometry(x, y, members, len(noise))
    null_b2, null_structure = null_levels(x, y, members, geom, noise=np.asarray(noise, float), offset=settings.offset,
                                          steps=settings.model_steps)
    return geom, null_b2, null_structure


def _cluster_terrain(x: np.ndarray, y: np.ndarray, z: np.ndarray, members: list[np.ndarray], z_ref: float
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per cluster (as (1, n_clusters) rows): mean member height above ``z_ref`` [m] and the terrain's
    plane gradient (dz/dx, dz/dy) [1] through the members."""
    zz = np.asarray(z, float)
    f = fit_planes(zz[None, :], x, y, members, residuals=False)
    memb = membership_matrix(members, len(zz))
    dz = np.asarray(memb.T @ np.nan_to_num(zz)) / np.asarray(memb.sum(axis=0)).ravel() - z_ref
    return dz[None, :], np.nan_to_num(f.grad_x), np.nan_to_num(f.grad_y)


def periods_from_arrays(times: pd.DatetimeIndex, clusters: np.ndarray, terms: dict[str, np.ndarray], *, unit: str,
                        min_steps: int = 3, max_lines: int = 12) -> list[dict]:
    """Runs of one regime (advective, in_situ, mixed) per cluster, longest first.

    ``terms`` holds (n_times, n_clusters) arrays ``regime`` (names, or int8
    codes into :data:`REGIMES`), ``tendency``,
    ``advection``, ``residual`` and their ``_se``.  Vectorised over the
    whole record; only the selected periods are averaged one by one.
    """
    reg = np.asarray(terms["regime"])
    n_t, n_c = reg.shape
    if n_t == 0 or n_c == 0:
        return []
    if reg.dtype.kind in "iu":  # int8 codes into REGIMES
        codes = reg.T.reshape(-1).astype(np.int16)  # cluster-major
    else:
        codes = pd.Categorical(reg.T.reshape(-1), categories=list(REGIMES)).codes.astype(np.int16)
    new = np.ones(codes.size, bool)
    new[1:] = codes[1:] != codes[:-1]
    new[::n_t] = True  # a run never crosses clusters
    starts = np.flatnonzero(new)
    lengths = np.diff(np.append(starts, codes.size))
    kind = codes[starts]
    good = (kind >= 0) & (kind <= 2) & (lengths >= min_steps)
    if not good.any():
        return []
    cand = np.flatnonzero(good)
    first_t = starts[cand] % n_t
    ranked = cand[np.lexsort((first_t, -lengths[cand]))]
    # take the longest periods of each regime in turn, so a short plume passage is not crowded
    # out by a long quiet night
    by_kind = [list(ranked[kind[ranked] == k]) for k in (0, 1, 2)]
    chosen = []
    while len(chosen) < max_lines and any(by_kind):
        for lst in by_kind:
            if lst and len(chosen) < max_lines:
                chosen.append(lst.pop(0))
    out = []
    cols = ("tendency", "advection", "residual", "tendency_se", "advection_se", "residual_se")
    for r in chosen:  # at most max_lines periods
        c, t0 = divmod(int(starts[r]), n_t)
        sl = slice(t0, t0 + int(lengths[r]))
        with np.errstate(invalid="ignore"):
            m = {k: float(np.nanmean(np.asarray(terms[k][sl, c], dtype=float))) for k in cols}
        regime = REGIMES[kind[r]]
        key = {"advective": "advection", "in_situ": "residual", "mixed": "tendency"}[regime]
        out.append({"cluster": str(clusters[c]), "regime": regime, "start": times[starts[r] % n_t],
                    "end": times[starts[r] % n_t + lengths[r] - 1], "steps": int(lengths[r]),
                    "rate": m[key], "rate_se": m[f"{key}_se"], "tendency": m["tendency"],
                    "advection": m["advection"], "residual": m["residual"], "unit": unit})
    return sorted(out, key=lambda p: (p["cluster"], p["start"]))


def main_periods(table: pd.DataFrame, *, unit: str, min_steps: int = 3, max_lines: int = 12) -> list[dict]:
    """:func:`periods_from_arrays` for a tidy table (one row per cluster and time)."""
    if table.empty:
        return []
    times = pd.DatetimeIndex(sorted(pd.DatetimeIndex(table["time"]).unique()))
    clusters = pd.unique(table["cluster"])
    cols = ("regime", "tendency", "advection", "residual", "tendency_se", "advection_se", "residual_se")
    ti = times.get_indexer(pd.DatetimeIndex(table["time"]))
    ci = pd.Index(clusters).get_indexer(table["cluster"])
    terms = {}
    for k in cols:
        arr = np.full((len(times), len(clusters)), "undetermined" if k == "regime" else np.nan,
                      dtype=object if k == "regime" else float)
        arr[ti, ci] = table[k].to_numpy()
        terms[k] = arr
    return periods_from_arrays(times, clusters, terms, unit=unit, min_steps=min_steps, max_lines=max_lines)
