"""Batched weighted least-squares plane fits: the gradient estimator.

For every cluster and time step the model

    T_i = a + b (x_i - xc) + c (y_i - yc) [+ d (z_i - zc)] + e_i

is fitted to the member stations present, with weights ``w_i = 1/sigma_i^2``
from the declared sensor uncertainty (Davies-Jones 1993; REFERENCES 1.1).
Coordinates are centred on the cluster's fixed centroid and scaled to km
(elevation to 100 m) before solving, as a careful polynomial fit does.
Three stations give the exact triangle solution (identical to Bellamy 1949
and the line-integral method, Davies-Jones 1993); more give a fit with
residual degrees of freedom.

Vectorisation: time steps are grouped by which member stations are present
(a bit pattern).  The complete pattern of every cluster is solved once and
applied to all its complete time steps with one batched matrix product; the
distinct incomplete (cluster, pattern) pairs are solved in one batched SVD
and applied by gather.  There is no Python loop over time steps.

Covariance: the *prior* covariance is ``(A^T W A)^-1`` (from the sensor
uncertainty alone).  Where dof > 0 the reduced chi-square
``chi2 = sum(w r^2) / dof`` is returned too; the *posterior* covariance is
``chi2 (A^T W A)^-1``, the convention of weighted least squares in
statsmodels (``WLS(...).fit().cov_params()``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: reason codes per (time, cluster)
OK, TOO_FEW, SINGULAR = 0, 1, 2
REASONS = {OK: "", TOO_FEW: "too few good stations", SINGULAR: "stations present are (nearly) collinear"}


@dataclass
class PlaneFit:
    """Fitted planes, arrays of shape (n_times, n_clusters).

    Units: ``value`` in the variable's unit at the cluster centre;
    ``grad_x``, ``grad_y`` [unit m-1] (grid east, north); ``grad_z``
    [unit m-1] when elevation was a regressor; variances (prior, from the
    sensor uncertainty) in the squares of those units; ``rms`` [unit] is the
    unweighted residual RMS and ``chi2`` the reduced chi-square (NaN where
    dof = 0).  Each (time, cluster) refers through ``pattern`` to a row of
    ``table``, which holds what depends only on which stations were present
    (variances, n_used, condition number, reason); the per-element arrays
    are gathered from it on access.
    """

    value: np.ndarray
    grad_x: np.ndarray
    grad_y: np.ndarray
    grad_z: np.ndarray | None
    pattern: np.ndarray
    table: dict[str, np.ndarray]
    chi2: np.ndarray | None
    rms: np.ndarray | None
    n_params: int

    def _get(self, name: str) -> np.ndarray:
        return self.table[name][self.pattern]

    def noise_part(self, name: str) -> np.ndarray | None:
        """The reading-noise part of a prior variance (``var_value``, ``var_x``, ``var_y``, ``cov_xy``,
        ``var_z``), when the fit was given ``noise``; else None."""
        key = f"{name}_noise"
        return self._get(key) if key in self.table else None

    @property
    def var_value(self) -> np.ndarray:
        """Prior variance of the centre value [unit^2]."""
        return self._get("var_value")

    @property
    def var_x(self) -> np.ndarray:
        """Prior variance of grad_x [unit^2 m-2]."""
        return self._get("var_x")

    @property
    def var_y(self) -> np.ndarray:
        """Prior variance of grad_y [unit^2 m-2]."""
        return self._get("var_y")

    @property
    def cov_xy(self) -> np.ndarray:
        """Prior covariance of grad_x and grad_y [unit^2 m-2]."""
        return self._get("cov_xy")

    @property
    def var_z(self) -> np.ndarray | None:
        """Prior variance of grad_z [unit^2 m-2], when elevation was fitted."""
        return self._get("var_z") if self.grad_z is not None else None

    @property
    def n_used(self) -> np.ndarray:
        """Stations used per fit."""
        return self._get("n_used")

    @property
    def cond(self) -> np.ndarray:
        """Condition number of the weighted, scaled design."""
        return self._get("cond")

    @property
    def reason(self) -> np.ndarray:
        """Reason code (OK, TOO_FEW, SINGULAR) per fit."""
        return self._get("reason")

    @property
    def dof(self) -> np.ndarray:
        """Residual degrees of freedom per fit (0 where no fit)."""
        return np.where(self.reason == OK, self.n_used - self.n_params, 0)

    def error_scale(self, model: str = "larger") -> np.ndarray:
        """Factor on the prior variances: 1 (prior), chi2 (posterior) or max(1, chi2)."""
        if model == "prior" or self.chi2 is None:
            return np.ones_like(self.value)
        dof = self.dof
        if model == "posterior":
            return np.where(dof > 0, self.chi2, 1.0)
        return np.where(dof > 0, np.fmax(self.chi2, 1.0), 1.0)


def _operators(A: np.ndarray, W: np.ndarray, max_cond: float):
    """Solution operators for a batch of weighted designs.

    A: (n, k, p) design, W: (n, k) weights (0 = absent).  Returns
    P (n, p, k) with coef = P @ values, Ninv (n, p, p) = (A^T W A)^-1,
    cond (n,) condition number of sqrt(W) A, ok (n,) usable.
    """
    sw = np.sqrt(W)
    B = sw[:, :, None] * A
    U, S, Vt = np.linalg.svd(B, full_matrices=False)
    smax = S[:, :1]
    with np.errstate(divide="ignore", invalid="ignore"):
        cond = S[:, 0] / S[:, -1]
        ok = np.isfinite(cond) & (cond <= max_cond)
        inv_s = np.where(S > smax * 1e-12, 1.0 / S, 0.0)
    V = np.swapaxes(Vt, 1, 2)
    Ninv = (V * inv_s[:, None, :] ** 2) @ Vt
    P = (V * inv_s[:, None, :]) @ (np.swapaxes(U, 1, 2) * sw[:, None, :])
    return P, Ninv, np.where(np.isfinite(cond), cond, np.inf), ok


def design(x: np.ndarray, y: np.ndarray, z: np.ndarray | None, members: np.ndarray,
           centres: np.ndarray | None, scale_m: float, scale_z: float) -> np.ndarray:
    """Centred, scaled design matrices (C, k, p) for clusters of equal size.

    ``members`` is (C, k) station indices; columns are 1, (x - xc)/scale_m,
    (y - yc)/scale_m and, with ``z``, (z - mean z)/scale_z.
    """
    px, py = x[members], y[members]
    if centres is None:
        cx, cy = px.mean(axis=1), py.mean(axis=1)
    else:
        cx, cy = centres[:, 0], centres[:, 1]
    cols = [np.ones_like(px), (px - cx[:, None]) / scale_m, (py - cy[:, None]) / scale_m]
    if z is not None:
        pz = z[members]
        cols.append((pz - pz.mean(axis=1)[:, None]) / scale_z)
    return np.stack(cols, axis=-1)


_ENTRIES = (("var_value", 0, 0), ("var_x", 1, 1), ("var_y", 2, 2), ("cov_xy", 1, 2), ("var_z", 3, 3))
#: the table entries that also come as a reading-noise part (``<name>_noise``)
NOISE_ENTRIES = ("var_value", "var_x", "var_y", "cov_xy", "var_z")
#: clusters with more members than this are solved per time step, not per missing-data bit pattern
MAX_PATTERN_BITS = 62


@dataclass(frozen=True)
class FitTuning:
    """Knobs of the plane fit that change its speed or numerics, not its science."""

    max_cond: float = 1e6  # largest condition number of the scaled design a fit may have
    scale_m: float = 1000.0  # horizontal coordinates are solved in units of this [m]
    scale_z: float = 100.0  # heights are solved in units of this [m]
    chunk_elements: int = 400_000  # values per batched product (time chunks that stay in cache)


@dataclass
class _Problem:
    """What every group of equal-size clusters reads: the values by station, weights, noise, options."""

    vt: np.ndarray  # (n_stations, n_times) values
    present: np.ndarray  # (n_stations, n_times) finite values
    all_present: bool
    x: np.ndarray
    y: np.ndarray
    z: np.ndarray | None
    w_station: np.ndarray
    noise2: np.ndarray | None
    centres: np.ndarray | None
    p: int  # coefficients: 3, or 4 with height
    min_n: int
    residuals: bool
    tuning: FitTuning

    @property
    def n_t(self) -> int:
        return self.vt.shape[1]


@dataclass
class _Output:
    """What the groups write: coefficients and pattern rows per (time, cluster), the table, residual stats."""

    coef: np.ndarray  # (p, n_times, n_clusters)
    pattern: np.ndarray  # (n_times, n_clusters) row of the table
    chi2: np.ndarray | None
    rms: np.ndarray | None
    tables: list[dict[str, np.ndarray]]
    n_rows: int = 0

    def add_rows(self, rows: dict[str, np.ndarray], count: int) -> int:
        """Append ``count`` table rows; the index of the first."""
        self.tables.append(rows)
        first, self.n_rows = self.n_rows, self.n_rows + count
        return first


@dataclass
class _Group:
    """Clusters of one size ``k``: their members (C, k), scaled designs, weights, noise variances."""

    k: int
    cols: slice  # their columns in the size-ordered output
    M: np.ndarray
    A: np.ndarray
    W: np.ndarray
    N2: np.ndarray | None


def _fit_wide(X: np.ndarray, A: np.ndarray, w: np.ndarray, noise2: np.ndarray | None, prob: _Problem
              ) -> dict[str, np.ndarray]:
    """One cluster of many stations, each time step from its normal equations.

    ``X`` (k, T) values, ``A`` (k, p) scaled design, ``w`` (k,) weights
    (0 = unusable station), ``noise2`` (k,) reading-noise variances or None.
    With centred, scaled coordinates and at most four coefficients the
    normal equations are well conditioned wherever the SVD route would
    accept the fit; the condition number of ``sqrt(W) A`` is
    ``sqrt(lambda_max / lambda_min)`` of ``A^T W A``.  Returns the table rows
    (one per time step) and ``coef`` (p, T), ``chi2``, ``rms`` (T,).
    """
    p, min_n, max_cond = prob.p, prob.min_n, prob.tuning.max_cond
    k, n_t = X.shape
    out: dict[str, list[np.ndarray]] = {}
    coef_all = np.full((p, n_t), np.nan)
    chi2 = np.full(n_t, np.nan)
    rms = np.full(n_t, np.nan)
    step = max(16, prob.tuning.chunk_elements // max(1, k))
    outer = np.einsum("kp,kq->kpq", A, A).reshape(k, p * p)
    for t0 in range(0, n_t, step):  # time chunks bound the memory; each is one batched solve
        ts = slice(t0, min(n_t, t0 + step))
        xc = X[:, ts]
        present = np.isfinite(xc) & (w > 0)[:, None]
        wt = np.where(present, w[:, None], 0.0)  # (k, T)
        x0 = np.where(present, xc, 0.0)
        N = (wt.T @ outer).reshape(-1, p, p)
        b = (wt * x0).T @ A  # (T, p)
        n_used = present.sum(axis=0)
        enough = n_used >= p
        lam = np.ones((N.shape[0], p))
        if enough.any():
            lam[enough] = np.linalg.eigvalsh(N[enough])
        with np.errstate(divide="ignore", invalid="ignore"):
            cond = np.where(enough & (lam[:, 0] > 0), np.sqrt(lam[:, -1] / lam[:, 0]), np.inf)
        ok = enough & (cond <= max_cond) & (n_used >= min_n)
        Ninv = np.full_like(N, np.nan)
        if ok.any():
            Ninv[ok] = np.linalg.inv(N[ok])
        coef = np.einsum("tpq,tq->tp", Ninv, b)
        coef_all[:, ts] = coef.T
        rows = _table_rows(Ninv, cond, ok, n_used, p)
        if noise2 is not None:
            # P = Ninv A^T W: the noise covariance is Ninv (A^T W diag(noise^2) W A) Ninv
            M2 = ((wt * wt * noise2[:, None]).T @ outer).reshape(-1, p, p)
            Cn = Ninv @ M2 @ Ninv
            for name, i, j in _ENTRIES:
                rows[f"{name}_noise"] = np.where(ok, Cn[:, i, j], np.nan) if i < p else np.full(len(ok), np.nan)
        for key, val in rows.items():
            out.setdefault(key, []).append(val)
        if prob.residuals:
            res = np.where(present, xc - A @ coef.T, 0.0)
            dof = n_used - p
            with np.errstate(invalid="ignore", divide="ignore"):
                chi2[ts] = np.where(ok & (dof > 0), (wt * res * res).sum(axis=0) / dof, np.nan)
                rms[ts] = np.where(ok, np.sqrt((res * res).sum(axis=0) / n_used), np.nan)
    if n_t == 0:  # no time steps (an empty part of a split record): empty rows, every key present
        out = {key: [val] for key, val in _table_rows(np.zeros((0, p, p)), np.zeros(0), np.zeros(0, bool),
                                                      np.zeros(0, np.int32), p).items()}
        if noise2 is not None:
            out.update({f"{name}_noise": [np.zeros(0)] for name, _, _ in _ENTRIES})
    table = {key: np.concatenate(val) for key, val in out.items()}
    table.update(coef=coef_all, chi2=chi2, rms=rms)
    return table


def fit_planes(
    values: np.ndarray,
    x: np.ndarray,
    y: np.ndarray,
    members: list[np.ndarray],
    *,
    z: np.ndarray | None = None,
    sigma: float | np.ndarray = 1.0,
    noise: float | np.ndarray | None = None,
    centres: np.ndarray | None = None,
    min_stations: int = 3,
    residuals: bool = True,
    tuning: FitTuning | None = None,
) -> PlaneFit:
    """Fit a plane per cluster and time step.

    Parameters
    ----------
    values
        (n_times, n_stations) array, NaN where a station has no good value.
    x, y
        Station grid coordinates [m].
    members
        Station indices of each cluster (any size; clusters of more than
        :data:`MAX_PATTERN_BITS` stations are solved time step by time step
        from their normal equations instead of by missing-data pattern).
    z
        Station elevations [m]; when given, elevation is a fourth regressor.
    sigma
        Standard uncertainty of one reading, scalar or per station [unit]:
        the weights are ``1/sigma^2`` and the prior covariance
        ``(A^T W A)^-1``.
    noise
        The part of ``sigma`` that is independent from one time step to the
        next (reading noise), scalar or per station [unit].  When given, the
        table also holds the covariance of the coefficients due to that part
        alone (``var_value_noise``, ``var_x_noise``, ``var_y_noise``,
        ``cov_xy_noise``: ``P diag(noise^2) P^T`` with P the weighted
        least-squares operator); the rest of the prior covariance comes from
        errors that persist in time (sensor offsets) and cancels in a
        tendency.
    centres
        (n_clusters, 2) fit centres [m]; default the member centroid.
    min_stations
        Fewest present stations a fit may use (at least the number of
        coefficients).
    residuals
        Compute residual RMS and chi-square (skip for speed when not needed).
    tuning
        Numerical knobs (:class:`FitTuning`); the defaults suit any network.
    """
    prob = _problem(values, x, y, z, sigma, noise, centres, min_stations, residuals, tuning or FitTuning())
    n_t, n_c, p = prob.n_t, len(members), prob.p
    sizes = np.array([len(m) for m in members], dtype=int)
    # time-major storage (time, cluster) with the clusters in size order: each time chunk is solved in a small
    # cluster-major buffer and copied in transposed, in cache; every later step (budget terms, window sums, the
    # Parquet and NetCDF columns) then reads the arrays in order, and the file writer copies none of them
    order = np.argsort(sizes, kind="stable")
    want_res = residuals and bool(np.any(sizes > p))
    out = _Output(np.empty((p, n_t, n_c)), np.empty((n_t, n_c), np.int32),
                  np.full((n_t, n_c), np.nan) if want_res else None,
                  np.full((n_t, n_c), np.nan) if residuals else None, [])
    first = 0
    for k in np.unique(sizes):
        sel = order[first:first + int(np.sum(sizes == k))]
        group = _group(prob, members, sel, int(k), slice(first, first + len(sel)))
        first += len(sel)
        if k > MAX_PATTERN_BITS:  # too many members for a bit pattern: each time step from its own equations
            _solve_wide(prob, out, group)
        else:
            _solve_patterns(prob, out, group)
    return _finish(prob, out, order)


def _problem(values, x, y, z, sigma, noise, centres, min_stations: int, residuals: bool, tuning: FitTuning
             ) -> _Problem:
    """The arrays every group reads, in the fit's own layout (see :func:`fit_planes` for the arguments)."""
    values = np.asarray(values, dtype=float)
    n_s = values.shape[1]
    zz = None if z is None else np.asarray(z, float)
    sig = np.broadcast_to(np.asarray(sigma, float), (n_s,))
    p = 3 if zz is None else 4
    noise2 = None if noise is None else np.broadcast_to(np.asarray(noise, float) ** 2, (n_s,))
    vt = np.ascontiguousarray(values.T)  # (n_s, n_t)
    present = ~np.isnan(vt)
    return _Problem(vt, present, bool(present.all()), np.asarray(x, float), np.asarray(y, float), zz, 1.0 / sig ** 2,
                    noise2, None if centres is None else np.asarray(centres), p, max(min_stations, p), residuals, tuning)


def _group(prob: _Problem, members: list[np.ndarray], sel: np.ndarray, k: int, cols: slice) -> _Group:
    """The clusters ``sel`` (all of ``k`` members): their scaled designs and weights."""
    M = np.stack([np.asarray(members[i]) for i in sel])
    A = design(prob.x, prob.y, prob.z, M, None if prob.centres is None else prob.centres[sel], prob.tuning.scale_m,
               prob.tuning.scale_z)
    W = prob.w_station[M]
    if prob.z is not None:
        W = np.where(np.isfinite(A).all(axis=2), W, 0.0)
        A = np.nan_to_num(A)
    return _Group(k, cols, M, A, W, None if prob.noise2 is None else prob.noise2[M])


def _solve_wide(prob: _Problem, out: _Output, g: _Group) -> None:
    """Clusters of more than :data:`MAX_PATTERN_BITS` members, one by one (there are few)."""
    for j, col in enumerate(range(g.cols.start, g.cols.stop)):
        wide = _fit_wide(prob.vt[g.M[j]], g.A[j], g.W[j], None if g.N2 is None else g.N2[j], prob)
        out.coef[:, :, col] = wide.pop("coef")
        chi2, rms = wide.pop("chi2"), wide.pop("rms")
        out.pattern[:, col] = out.add_rows(wide, prob.n_t) + np.arange(prob.n_t, dtype=np.int32)
        if out.chi2 is not None:
            out.chi2[:, col] = chi2
        if out.rms is not None:
            out.rms[:, col] = rms


@dataclass
class _Patterns:
    """The presence patterns of a group: complete (one solve per cluster) and the distinct incomplete ones."""

    full_ok: np.ndarray  # (C,) the complete pattern gives a fit
    full_rows: np.ndarray  # (C,) table row of each cluster's complete pattern
    full_code: int
    code_all: np.ndarray | None  # (C, T) pattern code per time; None when every step is complete
    uniq: np.ndarray  # distinct (cluster, incomplete pattern) keys, sorted
    base_row: int  # table row of uniq[0]
    Pf: np.ndarray  # (C, p, k) operators of the complete patterns
    Pu: np.ndarray | None  # (U, p, k) operators of the incomplete ones
    oku: np.ndarray | None  # (U,) the incomplete pattern gives a fit


def _solve_patterns(prob: _Problem, out: _Output, g: _Group) -> None:
    """Clusters of at most :data:`MAX_PATTERN_BITS` members: each distinct presence pattern solved once,
    applied to the time steps that have it in batched products over time chunks sized to stay in cache."""
    pats = _patterns(prob, out, g)
    step = max(16, prob.tuning.chunk_elements // max(1, (g.cols.stop - g.cols.start) * g.k))
    for t0 in range(0, prob.n_t, step):
        _apply_chunk(prob, out, g, pats, slice(t0, min(prob.n_t, t0 + step)))


def _patterns(prob: _Problem, out: _Output, g: _Group) -> _Patterns:
    """Solve the complete pattern of every cluster and every distinct incomplete (cluster, pattern) pair of
    the whole record; their table rows are appended to ``out``."""
    p, k, n_sel = prob.p, g.k, g.M.shape[0]
    Pf, Nf, cf, okf = _operators(g.A, g.W, prob.tuning.max_cond)
    Pf = Pf.copy()
    full_ok = okf & ((g.W > 0).sum(axis=1) >= prob.min_n)
    full_rows = out.add_rows(_table_rows(Nf, cf, full_ok, (g.W > 0).sum(axis=1), p, Pf, g.N2), n_sel) \
        + np.arange(n_sel, dtype=np.int32)
    full_code = (1 << k) - 1
    bits = (1 << np.arange(k, dtype=np.int64))
    if prob.all_present and (prob.z is None or bool((g.W > 0).all())):
        code_all = None  # complete data: every step uses the full pattern
        uniq = np.zeros(0, np.int64)
    else:
        code_type = np.uint8 if k <= 8 else np.uint16 if k <= 16 else np.uint32 if k <= 32 else np.int64
        code_all = np.zeros((n_sel, prob.n_t), code_type)
        for j in range(k):  # k is the cluster size (<= MAX_PATTERN_BITS), not time or stations
            code_all |= prob.present[g.M[:, j]].astype(code_type) << j
        if prob.z is not None:
            code_all &= ((g.W > 0).astype(np.int64) * bits[None, :]).sum(axis=1)[:, None].astype(code_type)
        inc_c, inc_t = np.nonzero(code_all != full_code)
        uniq = np.unique(inc_c.astype(np.int64) * (full_code + 1) + code_all[inc_c, inc_t])
        del inc_c, inc_t
    pats = _Patterns(full_ok, full_rows, full_code, code_all, uniq, out.n_rows, Pf, None, None)
    if uniq.size:
        _incomplete(prob, out, g, pats, bits)
    return pats


def _incomplete(prob: _Problem, out: _Output, g: _Group, pats: _Patterns, bits: np.ndarray) -> None:
    """Operators of the distinct incomplete patterns (``pats.uniq``), solved in one batch."""
    p, k, uniq, full_code = prob.p, g.k, pats.uniq, pats.full_code
    uc = uniq // (full_code + 1)
    mask = ((uniq % (full_code + 1))[:, None] & bits[None, :]) > 0
    nu = mask.sum(axis=1)
    # fewer stations than coefficients: rank-deficient by construction, nothing to solve
    # (condition number infinite); every incomplete pattern of a triangle is such a case
    Pu = np.zeros((uniq.size, p, k))
    Nu = np.full((uniq.size, p, p), np.nan)
    cu = np.full(uniq.size, np.inf)
    oku = np.zeros(uniq.size, bool)
    solve = np.flatnonzero(nu >= p)
    if solve.size:
        Pu[solve], Nu[solve], cu[solve], oku[solve] = _operators(g.A[uc[solve]], g.W[uc[solve]] * mask[solve],
                                                                 prob.tuning.max_cond)
    oku &= nu >= prob.min_n
    pats.base_row = out.add_rows(_table_rows(Nu, cu, oku, nu, p, Pu, None if g.N2 is None else g.N2[uc] * mask),
                                 uniq.size)
    pats.Pu, pats.oku = Pu, oku


def _apply_chunk(prob: _Problem, out: _Output, g: _Group, pats: _Patterns, ts: slice) -> None:
    """Coefficients (and residual statistics) of the group's clusters at the time steps ``ts``."""
    p, rows, n_sel = prob.p, g.cols, g.M.shape[0]
    t0, t1 = ts.start, ts.stop
    X = prob.vt[g.M, ts]  # (C, k, T) gather
    complete = (np.ones((n_sel, t1 - t0), bool) if pats.code_all is None
                else pats.code_all[:, ts] == pats.full_code)  # (C, T)
    # (C, p, T); einsum avoids per-batch BLAS calls.  Each element is its own sum, so the
    # incomplete ones (NaN here) are simply overwritten below
    coef = np.einsum("cpk,ckt->cpt", pats.Pf, X)
    pat = np.empty((n_sel, t1 - t0), np.int32)
    pat[...] = pats.full_rows[:, None]
    if not bool(complete.all()):
        ci, ti = np.nonzero(~complete)
        key = ci.astype(np.int64) * (pats.full_code + 1) + pats.code_all[ci, ti + t0]
        inv = np.searchsorted(pats.uniq, key)
        pat[ci, ti] = pats.base_row + inv
        ce = np.full((ci.size, p), np.nan)
        fit = np.flatnonzero(pats.oku[inv])  # solve only where a plane is defined
        if fit.size:
            xi = X[ci[fit], :, ti[fit]]
            ce[fit] = np.einsum("epk,ek->ep", pats.Pu[inv[fit]], np.where(np.isnan(xi), 0.0, xi))
        coef[ci, :, ti] = ce
    if not pats.full_ok.all():
        bad_c = ~pats.full_ok
        coef[bad_c] = np.where(complete[bad_c][:, None, :], np.nan, coef[bad_c])
    if prob.residuals and g.k > p:
        _residual_stats(prob, out, g, X, coef, ts)
    elif prob.residuals:
        out.rms[ts, rows] = np.where(np.isfinite(coef[:, 0]), 0.0, np.nan).T
    out.coef[:, ts, rows] = coef.transpose(1, 2, 0)
    out.pattern[ts, rows] = pat.T


def _residual_stats(prob: _Problem, out: _Output, g: _Group, X: np.ndarray, coef: np.ndarray, ts: slice) -> None:
    """Reduced chi-square and residual RMS of the fits ``coef`` (C, p, T) to ``X`` (C, k, T)."""
    present = ~np.isnan(X)
    if prob.z is not None:
        present &= (g.W > 0)[:, :, None]
    fitted = g.A @ coef
    res = np.where(present, X - fitted, 0.0)
    rss_w = np.einsum("ck,ckt->ct", g.W, res * res)
    nu_t = present.sum(axis=1)
    dof = nu_t - prob.p
    fine = np.isfinite(coef[:, 0])
    with np.errstate(invalid="ignore", divide="ignore"):
        out.chi2[ts, g.cols] = np.where(fine & (dof > 0), rss_w / dof, np.nan).T
        out.rms[ts, g.cols] = np.where(fine, np.sqrt((res * res).sum(axis=1) / nu_t), np.nan).T


def _finish(prob: _Problem, out: _Output, order: np.ndarray) -> PlaneFit:
    """Back to physical units and the callers' cluster order; the joined table."""
    scale_m, scale_z = prob.tuning.scale_m, prob.tuning.scale_z
    coef_all, pattern, chi2, rms = out.coef, out.pattern, out.chi2, out.rms
    coef_all[1:3] /= scale_m
    if prob.z is not None:
        coef_all[3] /= scale_z
    if not np.array_equal(order, np.arange(len(order))):
        back = np.argsort(order)
        coef_all, pattern = coef_all[:, :, back], pattern[:, back]
        chi2 = None if chi2 is None else chi2[:, back]
        rms = None if rms is None else rms[:, back]
    noisy = prob.noise2 is not None
    keys = ["var_value", "var_x", "var_y", "cov_xy", "var_z", "cond", "n_used", "reason"]
    if noisy:
        keys += [f"{name}_noise" for name in NOISE_ENTRIES]
    table = {key: np.concatenate([t[key] for t in out.tables]) if out.tables else np.empty(0) for key in keys}
    for key in ("var_x", "var_y", "cov_xy") + (("var_x_noise", "var_y_noise", "cov_xy_noise") if noisy else ()):
        table[key] = table[key] / scale_m ** 2
    table["var_z"] = table["var_z"] / scale_z ** 2
    if noisy:
        table["var_z_noise"] = table["var_z_noise"] / scale_z ** 2
    return PlaneFit(value=coef_all[0], grad_x=coef_all[1], grad_y=coef_all[2],
                    grad_z=None if prob.z is None else coef_all[3], pattern=pattern, table=table, chi2=chi2, rms=rms,
                    n_params=prob.p)


def _table_rows(Ninv: np.ndarray, cond: np.ndarray, ok: np.ndarray, n_used: np.ndarray, p: int,
                P: np.ndarray | None = None, noise2: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """Per-pattern table rows; with ``P`` (n, p, k) and ``noise2`` (n, k) also the reading-noise covariance."""
    rows: dict[str, np.ndarray] = {}
    for name, i, j in _ENTRIES:
        rows[name] = np.where(ok, Ninv[:, i, j], np.nan) if i < p else np.full(len(ok), np.nan)
    if noise2 is not None and P is not None:
        for name, i, j in _ENTRIES:
            rows[f"{name}_noise"] = (np.where(ok, np.einsum("nk,nk,nk->n", P[:, i], P[:, j], noise2), np.nan) if i < p
                                     else np.full(len(ok), np.nan))
    rows["cond"] = cond
    rows["n_used"] = n_used.astype(np.int32)
    rows["reason"] = np.where(ok, OK, np.where(n_used >= p, SINGULAR, TOO_FEW)).astype(np.int8)
    return rows


def triangle_gradient(x: np.ndarray, y: np.ndarray, t: np.ndarray) -> tuple[float, float]:
    """Exact gradient through three points (Bellamy 1949; REFERENCES 1.2).

    ``dT/dx = [T1 (y2-y3) + T2 (y3-y1) + T3 (y1-y2)] / 2A`` and
    ``dT/dy = [T1 (x3-x2) + T2 (x1-x3) + T3 (x2-x1)] / 2A``, with 2A the
    signed doubled area.  An independent route used to check the fit.
    """
    (x1, x2, x3), (y1, y2, y3), (t1, t2, t3) = x, y, t
    a2 = (x2 - x1) * (y3 - y1) - (x3 - x1) * (y2 - y1)
    return ((t1 * (y2 - y3) + t2 * (y3 - y1) + t3 * (y1 - y2)) / a2,
            (t1 * (x3 - x2) + t2 * (x1 - x3) + t3 * (x2 - x1)) / a2)
