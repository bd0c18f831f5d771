"""Equivalent potential temperature by integrating the pseudo-adiabat numerically: the
reference leeward's closed formula (Bolton 1980, his equation 39) is checked against.

A parcel at pressure p (Pa), temperature T (K) and water-vapour mixing ratio r (kg kg-1)
1. rises dry to its lifting condensation level, r constant;
2. rises along the water-saturation pseudo-adiabat (every condensate leaves at once) until
   its vapour is gone;
3. comes down dry to 1000 hPa: its temperature there is theta_e.

Equations, per kilogram of dry air (the entropy budget of dry air, vapour and liquid; from
memory, as in Iribarne and Godson 1981, Atmospheric Thermodynamics, chapters 4 and 7;
Bryan 2008, Mon. Wea. Rev. 136, 5239-5245, his pseudo-adiabatic entropy):

- unsaturated, r constant, e / p_d = r / epsilon constant:
  (c_pd + r c_pv) d ln T = (R_d + r R_v) d ln p_d, so
  T = T_0 (p_d / p_d0)^((R_d + r R_v) / (c_pd + r c_pv)) exactly;
- saturated, pseudo-adiabatic (the reversible equation with the total water equal to the
  vapour at each instant, Saunders 1957):
  (c_pd + r_s c_l) d ln T - R_d d ln p_d + d(L r_s / T) = 0, r_s = epsilon e_s(T) / p_d,
  L(T) = L_0 + (c_pv - c_l)(T - 273.15) (Kirchhoff's law); written as
  dT / d ln p_d = (R_d + L r_s / T) / (c_pd / T + r_s c_pv / T + (L r_s / T) d ln e_s/dT - L r_s / T^2);
- dry: T (p_0 / p_d)^(R_d / c_pd).

Saturation vapour pressure over liquid water: Murphy and Koop 2005 (Q. J. R. Meteorol. Soc.
131, 1539-1565, their equation 10, valid 123-332 K; from memory), not Bolton's equation 10
that leeward uses, so that the reference shares no formula with leeward.

Constants (from memory): R_v = 461.5 J kg-1 K-1, c_pv = 1875 J kg-1 K-1 (vapour),
c_l = 4190 J kg-1 K-1 (liquid water, Bolton 1980's value), L_0 = 2.501e6 J kg-1 at 0 C
(Bolton 1980, his equation 2); for dry air R_d = 287.04 J kg-1 K-1 and c_pd =
1005.7 J kg-1 K-1, the values Bolton computed his pseudo-adiabats with (kappa = 0.2854).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

R_D = 287.04
CP_D = 1005.7
R_V = 461.5
CP_V = 1875.0
C_L = 4190.0
L_0 = 2.501e6
EPS = R_D / R_V
P_0 = 100_000.0
#: The top of the saturated ascent, Pa of dry air: there (below 150 K for every parcel
#: with theta_e under 420 K, above the 123 K the saturation formula holds to) the vapour
#: left is below 1e-7 kg kg-1, and its latent heat is added in the limit form
#: exp(L r / (c_pd T)); ending at 20 or 50 hPa instead changes theta_e by less than 1e-4 K.
P_TOP = 3000.0


def ln_es(t: float) -> float:
    """ln of the saturation vapour pressure over liquid water, Pa (Murphy and Koop 2005,
    equation 10; from memory)."""
    return (54.842763 - 6763.22 / t - 4.210 * math.log(t) + 0.000367 * t
            + math.tanh(0.0415 * (t - 218.8)) * (53.878 - 1331.22 / t - 9.44523 * math.log(t) + 0.014025 * t))


def dln_es_dt(t: float, h: float = 1e-3) -> float:
    return (ln_es(t + h) - ln_es(t - h)) / (2.0 * h)


def latent_heat(t: float) -> float:
    return L_0 + (CP_V - C_L) * (t - 273.15)


def _saturated_rate(lnpd: float, y):
    t = y[0]
    pd = math.exp(lnpd)
    rs = EPS * math.exp(ln_es(t)) / pd
    lh = latent_heat(t)
    num = R_D + lh * rs / t
    den = CP_D / t + rs * CP_V / t + (lh * rs / t) * dln_es_dt(t) - lh * rs / t**2
    return [num / den]


def theta_e(p: float, t: float, r: float) -> float:
    """theta_e, K, of a parcel at p (Pa), T (K), mixing ratio r (kg kg-1), by the three
    steps above."""
    e = p * r / (EPS + r)
    pd0 = p - e
    if r <= 0.0:
        return t * (P_0 / p) ** (R_D / CP_D)
    expo = (R_D + r * R_V) / (CP_D + r * CP_V)
    temp = lambda pd: t * (pd / pd0) ** expo  # noqa: E731  (dry ascent)
    # Saturation where e_s(T(p_d)) = e(p_d) = p_d r / epsilon.
    gap = lambda pd: ln_es(temp(pd)) - math.log(pd * r / EPS)  # noqa: E731
    if gap(pd0) <= 0.0:
        pd_l = pd0  # saturated (or supersaturated) already
    else:
        pd_l = brentq(gap, 1.0, pd0, xtol=1e-9, rtol=1e-14)
    t_l = temp(pd_l)
    sol = solve_ivp(_saturated_rate, (math.log(pd_l), math.log(P_TOP)), [t_l], method="LSODA",
                    rtol=1e-10, atol=1e-8)
    assert sol.success, sol.message
    t_top = float(sol.y[0, -1])
    r_top = EPS * math.exp(ln_es(t_top)) / P_TOP
    return t_top * (P_0 / P_TOP) ** (R_D / CP_D) * math.exp(latent_heat(t_top) * r_top / (CP_D * t_top))


def theta_e_many(p, t, r) -> np.ndarray:
    return np.array([theta_e(float(a), float(b), float(c)) for a, b, c in zip(np.ravel(p), np.ravel(t), np.ravel(r))])
