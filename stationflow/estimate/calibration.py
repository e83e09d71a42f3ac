"""Sensors that disagree: each station's offset (and, for concentrations, gain) against its neighbours.

Takes the QC'd values of one variable on a (time, station) grid, the station positions and which
times to use; gives per station an offset [unit] and a gain [1] with standard errors, and the
fake advection each would cause.

Method (docs/method.md, "Sensors that disagree"):

1. **Prediction from the neighbours.** Each station's value is predicted from its nearest
   neighbours by a leave-one-out plane fit at the station (the QC spatial test's predictor,
   :func:`stationflow.qc.neighbours.neighbour_predictions`, heights adjusted with the network's
   vertical gradient of that time).  In a field that is smooth at the station scale the prediction
   is the truth plus the neighbours' own errors.
2. **A robust level of each station's residual** ``m_s`` (value minus prediction) over the
   selected times: Huber's M-estimate of location (c = 1.345, a MAD scale re-estimated each
   iteration, as ``statsmodels.robust.RLM`` with ``HuberT`` computes it; Huber 1981, Robust
   Statistics), so a plume or a cold pool that the plane cannot follow is down-weighted.
3. **Solve for the offsets.** An offset ``a`` shows in the residuals as ``(I - P) a``, with ``P``
   the leave-one-out prediction operator (each station's neighbour weights): the offsets are the
   least-squares, minimum-norm solution of ``(I - P) a = m``, so a biased station does not
   pass its bias to its neighbours.  Patterns the planes reproduce (a constant, a plane across the
   network) cannot be told from the field; they are left out.
4. **Gains** (concentrations): the same on the logarithms of the values, where a gain is an
   offset (a light-scattering sensor's response is mostly a gain; Barkjohn et al. 2021, Atmos.
   Meas. Tech. 14, 4617-4637); then offsets on the gain-corrected values.
5. **Reference.** Only differences between stations are seen; the network's median offset is set
   to 0 and its median gain to 1 ("relative to the network").
6. **Standard errors** from the robust residual spread with the effective number of independent
   periods: residuals of one station are correlated within an hour, so ``n_periods`` counts the
   distinct hours used and the errors use it instead of the number of steps; propagated through
   the solve exactly up to :data:`EXACT_ERRORS_UP_TO` stations.

Which times: well mixed ones, when the field is smooth at the station scale (common practice
for side-by-side sensor checks): daytime (sun above ``min_sun`` degrees at the network's centre)
with a network-median wind of at least ``min_wind``.  With fewer than :data:`MIN_TIMES` such
times the selection falls back to windy times, then to every time; ``method`` says which.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

#: fewest selected times for an estimate (else the next, wider selection)
MIN_TIMES = 24
#: Huber's tuning constant for 95 % efficiency at the normal distribution (Huber 1981)
HUBER_C = 1.345


@dataclass
class Biases:
    """Per station: offset [unit] and gain [1] with standard errors, periods used, how."""

    offset: np.ndarray
    offset_se: np.ndarray
    gain: np.ndarray
    gain_se: np.ndarray
    n_periods: np.ndarray
    method: str

    def correct(self, values: np.ndarray, station: np.ndarray) -> np.ndarray:
        """``values`` with these biases removed (:func:`remove_biases`)."""
        return remove_biases(values, station, self.offset, self.gain)


def remove_biases(values: np.ndarray, station: np.ndarray, offset: np.ndarray, gain: np.ndarray) -> np.ndarray:
    """``values`` (one per row, of the station ``station``) as ``(y - offset) / gain``; rows of unknown
    stations (-1), and stations without an estimate (NaN), are left as they are."""
    ok = station >= 0
    a = np.where(ok, offset[np.where(ok, station, 0)], 0.0)
    b = np.where(ok, gain[np.where(ok, station, 0)], 1.0)
    a, b = np.nan_to_num(a, nan=0.0), np.where(np.isfinite(b) & (b > 0), b, 1.0)
    return (values - a) / b


def select_times(times: pd.DatetimeIndex, wind_speed: np.ndarray | None, lat0: float, lon0: float, *,
                 min_wind: float, min_sun: float) -> tuple[np.ndarray, str]:
    """(which of ``times`` to use, the selection in words): see the module docstring."""
    from ..qc.neighbours import row_nanmedian, solar_elevation

    day = solar_elevation(times, lat0, lon0) > min_sun
    if wind_speed is None:
        windy = np.zeros(len(times), bool)
    else:
        with np.errstate(invalid="ignore"):
            windy = row_nanmedian(wind_speed) >= min_wind
    choices = [(day & windy, f"well mixed: daytime (sun above {min_sun:g} degrees) with a network-median wind of at "
                             f"least {min_wind:g} m/s"),
               (windy, f"windy times (network-median wind at least {min_wind:g} m/s), day or night"),
               (np.ones(len(times), bool), "every time (too few daytime or windy times): biases may include real "
                                           "station-scale structure such as cold pools")]
    for mask, words in choices:
        if mask.sum() >= MIN_TIMES:
            return mask, words
    return choices[-1]


def huber_location(y: np.ndarray, *, prior: np.ndarray | None = None, iterations: int = 30) -> dict[str, np.ndarray]:
    """Huber's M-estimate of the location of every column of ``y`` (n, m) at once (NaN where missing).

    Iteratively reweighted means with Huber's weights (:data:`HUBER_C`) and
    the MAD of the residuals about zero as the scale, re-estimated every
    iteration (the scheme of ``statsmodels.robust.RLM(y, ones, M=HuberT())``).
    ``prior``: weights of the rows (n,) that multiply the robust ones
    (default 1).  Returns ``a`` (the location), ``scale`` (the robust
    residual spread), ``n`` (points used), the final weights ``w`` and
    ``ok`` (finite points), one entry per column.
    """
    ok = np.isfinite(y)
    y0 = np.where(ok, y, 0.0)
    base = ok.astype(float) if prior is None else ok * np.asarray(prior, float)[:, None]
    w = base.copy()
    for _ in range(iterations):
        with np.errstate(invalid="ignore", divide="ignore"):
            a = (w * y0).sum(axis=0) / w.sum(axis=0)
            r = np.where(ok, y0 - a, np.nan)
            scale = _mad(r)
            u = np.abs(r) / (HUBER_C * scale)
            w = np.nan_to_num(np.where(ok, np.where(u <= 1.0, 1.0, 1.0 / u), 0.0) * base)
    return {"a": a, "scale": scale, "n": ok.sum(axis=0), "w": w, "ok": ok}


def _mad(r: np.ndarray) -> np.ndarray:
    """Normalised median absolute deviation about zero per column (NaN ignored)."""
    with np.errstate(invalid="ignore"):
        from ..qc.neighbours import row_nanmedian

        return row_nanmedian(np.abs(r).T) / 0.6744897501960817


def standard_error(fit: dict, periods: np.ndarray) -> np.ndarray:
    """Standard error of a :func:`huber_location`: the weighted mean's error with the robust scale, the
    number of points replaced by the number of independent ``periods`` (serially correlated residuals)."""
    n = np.maximum(fit["n"], 1)
    inflate = n / np.maximum(periods, 1)  # n correlated points carry the information of `periods` ones
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.sqrt(fit["scale"] ** 2 / fit["w"].sum(axis=0) * inflate)


def loo_operator(x: np.ndarray, y: np.ndarray, neighbours: int = 6):
    """The leave-one-out prediction as a sparse (n, n) matrix ``P``: row s holds the weights of station s's
    neighbours in the equal-weight plane through them evaluated at s (the intercept row of the plane's
    pseudo-inverse, all stations at once)."""
    from scipy.sparse import csr_matrix
    from scipy.spatial import cKDTree

    n = len(x)
    k = min(neighbours, n - 1)
    _, idx = cKDTree(np.column_stack([x, y])).query(np.column_stack([x, y]), k=k + 1)
    nb = idx[:, 1:]
    scale = 1000.0  # km: a well-conditioned design
    A = np.stack([np.ones((n, k)), (x[nb] - x[:, None]) / scale, (y[nb] - y[:, None]) / scale], axis=-1)
    w = np.linalg.pinv(A)[:, 0, :]  # (n, k): the intercept (the value at the station) from the neighbours
    return csr_matrix((w.reshape(-1), (np.repeat(np.arange(n), k), nb.reshape(-1))), shape=(n, n))


#: stations up to which the offsets' errors are propagated exactly (a dense pseudo-inverse); above, approximately
EXACT_ERRORS_UP_TO = 1500


def solve_offsets(P, m: np.ndarray, m_se: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The offsets ``a`` whose leave-one-out residuals ``(I - P) a`` are ``m`` (least squares, minimum norm:
    a pattern the planes reproduce, a constant or a plane across the network, cannot be told from the
    field and is left out), and their standard errors from ``m_se`` (exactly up to
    :data:`EXACT_ERRORS_UP_TO` stations, else each station's own)."""
    from scipy.sparse import identity

    n = len(m)
    ok = np.isfinite(m) & np.isfinite(m_se)
    M = (identity(n, format="csr") - P)[ok][:, ok]
    a = np.full(n, np.nan)
    se = np.full(n, np.nan)
    if not ok.any():
        return a, se
    if ok.sum() <= EXACT_ERRORS_UP_TO:
        pinv = np.linalg.pinv(M.toarray(), rcond=1e-8)  # the patterns the planes reproduce are exactly singular
        a[ok] = pinv @ m[ok]
        se[ok] = np.sqrt((pinv ** 2) @ (m_se[ok] ** 2))
    else:
        from scipy.sparse.linalg import lsqr

        a[ok] = lsqr(M, m[ok], damp=1e-6, atol=1e-10, btol=1e-10, iter_lim=10 * n)[0]
        se[ok] = m_se[ok]
    return a, se


def estimate_biases(values: np.ndarray, times: pd.DatetimeIndex, positions: tuple, *, concentration: bool,
                    selection: tuple[np.ndarray, str], sigma: float = 1.0) -> Biases:
    """Offsets (and gains) of every station from ``values`` (n_times, n_stations) at ``times``.

    ``positions``: station x, y [m] and heights z [m]; ``selection``: the
    times to use and the selection in words (:func:`select_times`);
    ``concentration``: estimate gains too (from the logarithms of the
    values, where a gain is an offset), then offsets.  See the module docstring.
    """
    from ..qc.neighbours import neighbour_predictions

    x, y, z = positions
    use, words = selection
    v = np.asarray(values, float)[use]
    hours = pd.Series(pd.DatetimeIndex(times[use]).floor("h").asi8)
    P = loo_operator(np.asarray(x, float), np.asarray(y, float))
    n_s = v.shape[1]
    gain, gain_se = np.ones(n_s), np.zeros(n_s)
    if concentration:
        lv = np.log(np.where(v > 1.0, v, np.nan))  # (below 1 unit the relative noise is too large)
        m, m_se, _ = _residual_level(lv, neighbour_predictions(lv, x, y, z, sigma=sigma), hours)
        log_gain, log_se = solve_offsets(P, m, m_se)
        if np.isfinite(log_gain).any():
            log_gain -= np.nanmedian(log_gain)  # the network's median gain is 1
        gain, gain_se = np.exp(log_gain), np.exp(log_gain) * log_se
        v = v / np.where(np.isfinite(gain), gain, 1.0)
    m, m_se, periods = _residual_level(v, neighbour_predictions(v, x, y, z, sigma=sigma), hours)
    offset, offset_se = solve_offsets(P, m, m_se)
    if np.isfinite(offset).any():
        offset -= np.nanmedian(offset)  # the network's median offset is 0
    return Biases(offset, offset_se, np.where(np.isfinite(gain), gain, 1.0), np.where(np.isfinite(gain_se), gain_se, np.nan),
                  periods, f"leave-one-out residuals of the neighbours' plane, robust level per station, solved "
                           f"for the offsets{' and gains (from the logarithms)' if concentration else ''}; {words}")


def _residual_level(v: np.ndarray, pred: np.ndarray, hours: pd.Series) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per station: the robust (Huber) level of ``v - pred`` over time, its standard error with one
    independent period per hour, and the number of such periods."""
    r = v - pred
    # times when the field is not smooth at the station scale (a plume's edge, a front) show a wide spread of
    # residuals across the network: they count less (weights 1 / spread^2, the spread a robust MAD)
    from ..qc.neighbours import row_nanmedian

    with np.errstate(invalid="ignore"):
        spread = 1.4826 * row_nanmedian(np.abs(r - row_nanmedian(r)[:, None]))
        typical = np.nanmedian(spread) if np.isfinite(spread).any() else 1.0
        prior = np.where(np.isfinite(spread), 1.0 / np.fmax(spread, 0.1 * typical) ** 2, 0.0) * typical ** 2
    fit = huber_location(r, prior=prior)
    n_s = r.shape[1]
    used = fit["ok"]
    hour_code = pd.factorize(hours)[0].astype(np.int64)
    t_i, s_i = np.nonzero(used)
    pairs = np.unique(hour_code[t_i] * n_s + s_i)  # distinct (hour, station) pairs
    periods = np.bincount(pairs % n_s, minlength=n_s)
    se = standard_error(fit, periods)
    level = np.where(fit["n"] >= 3, fit["a"], np.nan)
    return level, np.where(fit["n"] >= 3, se, np.nan), periods


def fake_advection(bias: np.ndarray, x: np.ndarray, y: np.ndarray, members: list[np.ndarray], wind_speed: float
                   ) -> np.ndarray:
    """Per station: the largest advection [unit h-1] its ``bias`` [unit] would fake in any cluster it is a
    member of, in a wind of ``wind_speed`` [m s-1] along the faked gradient (the equal-weight plane's
    gradient response to one station, the members' pseudo-inverse)."""
    out = np.zeros(len(x))
    if not members or not np.isfinite(wind_speed):
        return np.full(len(x), np.nan)
    sizes = np.array([len(m) for m in members])
    for k in np.unique(sizes):  # a few cluster sizes (triangles, mostly), each solved as one batch
        M = np.stack([members[i] for i in np.flatnonzero(sizes == k)])
        px, py = x[M], y[M]
        A = np.stack([np.ones_like(px), px - px.mean(axis=1, keepdims=True), py - py.mean(axis=1, keepdims=True)],
                     axis=-1)
        G = np.linalg.pinv(A)[:, 1:3, :]  # (C, 2, k): each member's weight in the gradient [m-1]
        response = np.hypot(G[:, 0, :], G[:, 1, :])  # |grad| per unit bias of each member [m-1]
        np.maximum.at(out, M.reshape(-1), response.reshape(-1))
    return np.abs(bias) * out * wind_speed * 3600.0


def barkjohn2021(pm: np.ndarray, rh: np.ndarray) -> np.ndarray:
    """PM2.5 [ug m-3] from a light-scattering sensor's reading ``pm`` (the CF=1 channel average) and the
    relative humidity ``rh`` [%]: ``0.524 pm - 0.0862 rh + 5.75``, the US-wide correction of Barkjohn,
    Gantt and Clements (2021), Atmos. Meas. Tech. 14, 4617-4637, their Eq. 4 for readings up to about
    250 ug m-3 (equation from memory; check it against the paper before relying on it).  NaN where the
    humidity is unknown."""
    return 0.524 * np.asarray(pm, float) - 0.0862 * np.asarray(rh, float) + 5.75


def nearest_humidity(rh: np.ndarray, codes: np.ndarray, time_ns: np.ndarray, x: np.ndarray, y: np.ndarray, *,
                     candidates: int = 8) -> tuple[np.ndarray, np.ndarray]:
    """Per row: the relative humidity of the same station at that time, else of the nearest of its
    ``candidates`` nearest stations that reports one at that time; and where it came from (0 the same
    station, 1 another, -1 none).  ``codes``: each row's station (-1 unknown), ``x``, ``y`` [m] by station."""
    from scipy.spatial import cKDTree

    out = np.asarray(rh, float).copy()
    source = np.where(np.isfinite(out), 0, -1)
    n_s = len(x)
    k = min(candidates, n_s - 1)
    if k < 1 or not np.isfinite(out).any():
        return out, source
    _, near = cKDTree(np.column_stack([x, y])).query(np.column_stack([x, y]), k=k + 1)
    t_code = pd.factorize(time_ns)[0].astype(np.int64)
    have = np.isfinite(out) & (codes >= 0)
    lookup = pd.Series(out[have], index=t_code[have] * n_s + codes[have])  # (time, station) -> humidity
    lookup = lookup[~lookup.index.duplicated()]
    for r in range(1, k + 1):  # the r-th nearest station, for every row still without humidity at once
        todo = np.flatnonzero((source < 0) & (codes >= 0))
        if todo.size == 0:
            break
        donor = near[codes[todo], r]
        got = lookup.reindex(t_code[todo] * n_s + donor).to_numpy()
        ok = np.isfinite(got)
        out[todo[ok]] = got[ok]
        source[todo[ok]] = 1
    return out, source
