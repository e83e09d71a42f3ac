"""Wind: cluster-mean winds and kinematic properties from plane fits of u and v.

With ``u`` and ``v`` fitted as planes over a cluster (the same batched
estimator as for scalars), the horizontal wind derivatives give
(Bellamy 1949; Davies-Jones 1993; REFERENCES 1.5):

    divergence            delta = du/dx + dv/dy
    vertical vorticity    zeta  = dv/dx - du/dy
    stretching deformation D1 = du/dx - dv/dy
    shearing deformation   D2 = dv/dx + du/dy

Errors assume independent u and v errors: var(delta) = var(du/dx) +
var(dv/dy), and so on.  All derivatives are in s-1.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from stationflow.variables import wind_components, wind_direction

from .planes import PlaneFit, fit_planes

__all__ = ["WindFit", "fit_wind", "kinematics", "vector_mean", "wind_components", "wind_direction"]


@dataclass
class WindFit:
    """Plane fits of u and v; arrays (n_times, n_clusters)."""

    u: PlaneFit
    v: PlaneFit


def fit_wind(u: np.ndarray, v: np.ndarray, x: np.ndarray, y: np.ndarray, members: list[np.ndarray], *,
             sigma: float = 0.5, min_stations: int = 3, residuals: bool = True) -> WindFit:
    """Fit planes to u and v [m s-1] (grid axes) in one batched call.

    ``residuals=False`` skips the residual RMS and chi-square (None), which
    :func:`kinematics` does not use.
    """
    n_t = u.shape[0]
    both = fit_planes(np.concatenate([u, v], axis=0), x, y, members, sigma=sigma, min_stations=min_stations,
                      residuals=residuals)

    def half(sl: slice) -> PlaneFit:
        return PlaneFit(value=both.value[sl], grad_x=both.grad_x[sl], grad_y=both.grad_y[sl], grad_z=None,
                        pattern=both.pattern[sl], table=both.table,
                        chi2=None if both.chi2 is None else both.chi2[sl],
                        rms=None if both.rms is None else both.rms[sl], n_params=both.n_params)

    return WindFit(half(slice(0, n_t)), half(slice(n_t, 2 * n_t)))


def kinematics(w: WindFit, *, deformation: bool = True) -> dict[str, np.ndarray]:
    """Divergence, vorticity and (unless ``deformation=False``) deformations [s-1] with standard errors."""
    u, v = w.u, w.v
    var_ux, var_uy, var_vx, var_vy = u.var_x, u.var_y, v.var_x, v.var_y
    se_dd = np.sqrt(var_ux + var_vy)
    se_zz = np.sqrt(var_vx + var_uy)
    if not deformation:
        return {"divergence": u.grad_x + v.grad_y, "divergence_se": se_dd,
                "vorticity": v.grad_x - u.grad_y, "vorticity_se": se_zz}
    d1 = u.grad_x - v.grad_y
    d2 = v.grad_x + u.grad_y
    return {
        "divergence": u.grad_x + v.grad_y, "divergence_se": se_dd,
        "vorticity": v.grad_x - u.grad_y, "vorticity_se": se_zz,
        "stretching_deformation": d1, "stretching_deformation_se": se_dd,
        "shearing_deformation": d2, "shearing_deformation_se": se_zz,
        "total_deformation": np.hypot(d1, d2),
        "dilatation_axis": np.rad2deg(0.5 * np.arctan2(d2, d1)),
    }


def vector_mean(speed: np.ndarray, direction: np.ndarray, *, axis: int = 0, calm_speed: float = 0.5) -> tuple[np.ndarray, np.ndarray]:
    """Vector-mean speed [m s-1] and direction [degree] along ``axis``.

    Calm reports (below ``calm_speed``) count as zero wind; NaN is ignored.
    The scalar mean overstates transport: 5 m s-1 from north half the time
    and from south the other half gives a vector mean of zero.
    """
    s = np.asarray(speed, float)
    d = np.asarray(direction, float)
    calm = s < calm_speed
    u, v = wind_components(np.where(calm, 0.0, s), np.where(calm, 0.0, d))
    mu, mv = np.nanmean(u, axis=axis), np.nanmean(v, axis=axis)
    return np.hypot(mu, mv), wind_direction(mu, mv)
