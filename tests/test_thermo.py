"""Potential temperature and the standard atmosphere against published and computed values."""

import numpy as np
import pytest

from stationflow.estimate import thermo


# REFERENCES.md 2.2, check values computed there with Poisson's equation, kappa = R_d/c_p ~ 0.2857.
@pytest.mark.parametrize("t, p_hpa, theta", [(280.0, 900.0, 288.56), (273.15, 850.0, 286.13), (288.15, 1013.25, 287.07)])
def test_potential_temperature(t, p_hpa, theta):
    assert thermo.potential_temperature(t, p_hpa * 100) == pytest.approx(theta, abs=0.01)


# ICAO / ISO 2533 standard atmosphere pressures (REFERENCES.md 2.2, computed to 0.01 hPa).
@pytest.mark.parametrize("z, p_hpa", [(0, 1013.25), (250, 983.58), (500, 954.61), (1000, 898.75), (1500, 845.56), (2000, 794.95)])
def test_standard_pressure(z, p_hpa):
    assert thermo.standard_pressure(z) / 100 == pytest.approx(p_hpa, abs=0.01)


def test_gas_constant_from_universal_constants():
    # US Standard Atmosphere 1976: R* = 8.31432, M = 28.9644 g/mol -> R_d = 287.05 J/kg/K
    assert thermo.R_D == pytest.approx(287.05, abs=0.01)
    assert thermo.KAPPA == pytest.approx(2 / 7, abs=1e-3)


def test_hypsometric_wallace_hobbs_exercise():
    # Wallace & Hobbs (2006) ch. 3 exercise: with 1014 hPa at sea level and a scale height of 8 km,
    # the 1000 hPa surface lies about 112 m up; 8000 ln(1.014) = 111.2 m (REFERENCES.md 7.4).
    t_for_8km = 8000.0 * thermo.G0 / thermo.R_D
    assert thermo.hypsometric_thickness(1014.0, 1000.0, t_for_8km) == pytest.approx(111.2, abs=0.1)


def test_dtheta_dz_near_dry_adiabatic():
    # theta of a standard-atmosphere column rises by about g/cp - 6.5 K/km = 3.3 K/km
    z = np.array([0.0, 1000.0])
    t = 288.15 - 0.0065 * z
    th = thermo.potential_temperature(t, thermo.standard_pressure(z))
    assert (th[1] - th[0]) == pytest.approx(9.80665 / thermo.CP_D * 1000 - 6.5, abs=0.35)
