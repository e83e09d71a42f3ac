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


def _fit_wide(X: np.ndarray, A: np.ndarray, w: np.ndarray, noise2: np.ndarray | None, *, p: int, min_n: int,
              max_cond: float, residuals: bool, chunk_elements: int) -> dict[str, np.ndarray]:
    """One cluster of many stations, each time step from its normal equations.

    ``X`` (k, T) values, ``A`` (k, p) scaled design, ``w`` (k,) weights
    (0 = unusable station), ``noise2`` (k,) reading-noise variances or None.
    With centred, scaled coordinates and at most four coefficients the
    normal equations are well conditioned wherever the SVD route would
    accept the fit; the condition number of ``sqrt(W) A`` is
    ``sqrt(lambda_max / lambda_min)`` of ``A^T W A``.  Returns the table rows
    (one per time step) and ``coef`` (p, T), ``chi2``, ``rms`` (T,).
    """
    k, n_t = X.shape
    out: dict[str, list[np.ndarray]] = {}
    coef_all = np.full((p, n_t), np.nan)
    chi2 = np.full(n_t, np.nan)
    rms = np.full(n_t, np.nan)
    step = max(16, chunk_elements // max(1, k))
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
        if residuals:
            res = np.where(present, xc - A @ coef.T, 0.0)
            dof = n_used - p
            with np.errstate(invalid="ignore", divide="ignore"):
                chi2[ts] = np.where(ok & (dof > 0), (wt * res * res).sum(axis=0) / dof, np.nan)
                rms[ts] = np.where(ok, np.sqrt((res * res).sum(axis=0) / n_used), np.nan)
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
    max_cond: float = 1e6,
    residuals: bool = True,
    scale_m: float = 1000.0,
    scale_z: float = 100.0,
    chunk_elements: int = 400_000,
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
    """
    values = np.asarray(values, dtype=float)
    n_t, n_s = values.shape
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    zz = None if z is None else np.asarray(z, float)
    sig = np.broadcast_to(np.asarray(sigma, float), (n_s,))
    w_station = 1.0 / sig ** 2
    p = 3 if zz is None else 4
    min_n = max(min_stations, p)
    n_c = len(members)
    sizes = np.array([len(m) for m in members], dtype=int)
    noise2 = None if noise is None else np.broadcast_to(np.asarray(noise, float) ** 2, (n_s,))
    # time-major storage (time, cluster) with the clusters in size order: each time chunk is solved in a small
    # cluster-major buffer and copied in transposed, in cache; every later step (budget terms, window sums, the
    # Parquet and NetCDF columns) then reads the arrays in order, and the file writer copies none of them
    order = np.argsort(sizes, kind="stable")
    coef_all = np.empty((p, n_t, n_c))
    pattern = np.empty((n_t, n_c), np.int32)
    want_res = residuals and bool(np.any(sizes > p))
    chi2 = np.full((n_t, n_c), np.nan) if want_res else None
    rms = np.full((n_t, n_c), np.nan) if residuals else None
    tables: list[dict[str, np.ndarray]] = []
    n_rows = 0
    vt = np.ascontiguousarray(values.T)  # (n_s, n_t)
    present_st = ~np.isnan(vt)
    all_present = bool(present_st.all())
    first = 0
    for k in np.unique(sizes):
        sel = order[first:first + int(np.sum(sizes == k))]
        rows = slice(first, first + len(sel))
        first += len(sel)
        M = np.stack([np.asarray(members[i]) for i in sel])
        A = design(x, y, zz, M, None if centres is None else np.asarray(centres)[sel], scale_m, scale_z)
        W = w_station[M]
        if zz is not None:
            W = np.where(np.isfinite(A).all(axis=2), W, 0.0)
            A = np.nan_to_num(A)
        N2 = None if noise2 is None else noise2[M]
        if k > MAX_PATTERN_BITS:
            # too many members for a bit pattern: each time step from its own normal equations
            for j, col in enumerate(range(rows.start, rows.stop)):  # loop over the (few) wide clusters
                wide = _fit_wide(vt[M[j]], A[j], W[j], None if N2 is None else N2[j], p=p, min_n=min_n,
                                 max_cond=max_cond, residuals=residuals, chunk_elements=chunk_elements)
                coef_all[:, :, col] = wide.pop("coef")
                pattern[:, col] = n_rows + np.arange(n_t, dtype=np.int32)
                n_rows += n_t
                if chi2 is not None:
                    chi2[:, col] = wide.pop("chi2")
                if rms is not None:
                    rms[:, col] = wide.pop("rms")
                tables.append(wide)
            continue
        Pf, Nf, cf, okf = _operators(A, W, max_cond)
        Pf = Pf.copy()
        full_ok = okf & ((W > 0).sum(axis=1) >= min_n)
        tables.append(_table_rows(Nf, cf, full_ok, (W > 0).sum(axis=1), p, Pf, N2))
        full_rows = n_rows + np.arange(len(sel), dtype=np.int32)
        n_rows += len(sel)
        full_code = (1 << k) - 1
        bits = (1 << np.arange(k, dtype=np.int64))
        # every distinct incomplete (cluster, pattern) pair of the whole record, solved once
        if all_present and (zz is None or bool((W > 0).all())):
            code_all = None  # complete data: every step uses the full pattern
            uniq = np.zeros(0, np.int64)
        else:
            code_type = np.uint8 if k <= 8 else np.uint16 if k <= 16 else np.uint32 if k <= 32 else np.int64
            code_all = np.zeros((len(sel), n_t), code_type)
            for j in range(k):  # k is the cluster size (<= MAX_PATTERN_BITS), not time or stations
                code_all |= present_st[M[:, j]].astype(code_type) << j
            if zz is not None:
                code_all &= ((W > 0).astype(np.int64) * bits[None, :]).sum(axis=1)[:, None].astype(code_type)
            inc_c, inc_t = np.nonzero(code_all != full_code)
            uniq = np.unique(inc_c.astype(np.int64) * (full_code + 1) + code_all[inc_c, inc_t])
            del inc_c, inc_t
        if uniq.size:
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
                Pu[solve], Nu[solve], cu[solve], oku[solve] = _operators(A[uc[solve]], W[uc[solve]] * mask[solve],
                                                                         max_cond)
            oku &= nu >= min_n
            tables.append(_table_rows(Nu, cu, oku, nu, p, Pu, None if N2 is None else N2[uc] * mask))
            base_row = n_rows
            n_rows += uniq.size
        # time chunks sized to stay in cache; each chunk is one batched product
        step = max(16, chunk_elements // max(1, len(sel) * k))
        for t0 in range(0, n_t, step):
            t1 = min(n_t, t0 + step)
            ts = slice(t0, t1)
            X = vt[M, ts]  # (C, k, T) gather
            complete = (np.ones((len(sel), t1 - t0), bool) if code_all is None
                        else code_all[:, ts] == full_code)  # (C, T)
            all_complete = bool(complete.all())
            # (C, p, T); einsum avoids per-batch BLAS calls.  Each element is its own sum, so the
            # incomplete ones (NaN here) are simply overwritten below
            coef = np.einsum("cpk,ckt->cpt", Pf, X)
            pat = np.empty((len(sel), t1 - t0), np.int32)
            pat[...] = full_rows[:, None]
            if not all_complete:
                ci, ti = np.nonzero(~complete)
                key = ci.astype(np.int64) * (full_code + 1) + code_all[ci, ti + t0]
                inv = np.searchsorted(uniq, key)
                pat[ci, ti] = base_row + inv
                ce = np.full((ci.size, p), np.nan)
                fit = np.flatnonzero(oku[inv])  # solve only where a plane is defined
                if fit.size:
                    xi = X[ci[fit], :, ti[fit]]
                    ce[fit] = np.einsum("epk,ek->ep", Pu[inv[fit]], np.where(np.isnan(xi), 0.0, xi))
                coef[ci, :, ti] = ce
            if not full_ok.all():
                bad_c = ~full_ok
                coef[bad_c] = np.where(complete[bad_c][:, None, :], np.nan, coef[bad_c])
            if residuals and k > p:
                present = ~np.isnan(X)
                if zz is not None:
                    present &= (W > 0)[:, :, None]
                fitted = A @ coef
                res = np.where(present, X - fitted, 0.0)
                rss_w = np.einsum("ck,ckt->ct", W, res * res)
                nu_t = present.sum(axis=1)
                dof = nu_t - p
                fine = np.isfinite(coef[:, 0])
                with np.errstate(invalid="ignore", divide="ignore"):
                    chi2[ts, rows] = np.where(fine & (dof > 0), rss_w / dof, np.nan).T
                    rms[ts, rows] = np.where(fine, np.sqrt((res * res).sum(axis=1) / nu_t), np.nan).T
            elif residuals:
                rms[ts, rows] = np.where(np.isfinite(coef[:, 0]), 0.0, np.nan).T
            coef_all[:, ts, rows] = coef.transpose(1, 2, 0)
            pattern[ts, rows] = pat.T
    coef_all[1:3] /= scale_m
    if zz is not None:
        coef_all[3] /= scale_z
    if not np.array_equal(order, np.arange(n_c)):
        back = np.argsort(order)
        coef_all, pattern = coef_all[:, :, back], pattern[:, back]
        chi2 = None if chi2 is None else chi2[:, back]
        rms = None if rms is None else rms[:, back]
    keys = ["var_value", "var_x", "var_y", "cov_xy", "var_z", "cond", "n_used", "reason"]
    if noise2 is not None:
        keys += [f"{name}_noise" for name in NOISE_ENTRIES]
    table = {key: np.concatenate([t[key] for t in tables]) if tables else np.empty(0) for key in keys}
    for key in ("var_x", "var_y", "cov_xy") + (("var_x_noise", "var_y_noise", "cov_xy_noise") if noise2 is not None else ()):
        table[key] = table[key] / scale_m ** 2
    table["var_z"] = table["var_z"] / scale_z ** 2
    if noise2 is not None:
        table["var_z_noise"] = table["var_z_noise"] / scale_z ** 2
    return PlaneFit(value=coef_all[0], grad_x=coef_all[1], grad_y=coef_all[2],
                    grad_z=None if zz is None else coef_all[3], pattern=pattern, table=table, chi2=chi2, rms=rms,
                    n_params=p)


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
