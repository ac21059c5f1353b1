"""Physical constants in the units the engine works in (eV, cm, s, Mpc).

Values come from astropy.constants (CODATA 2018) so that there is one source
for every number; derived factors are computed here, never typed in.
"""

import math

import astropy.constants as _c
import astropy.units as _u

#: hbar in eV s.
HBAR_EV_S = _c.hbar.to_value(_u.eV * _u.s)
#: hbar c in eV cm: converts a number density in cm^-3 to eV^3.
HBAR_C_EV_CM = (_c.hbar * _c.c).to_value(_u.eV * _u.cm)
#: Electron rest energy in eV.
ELECTRON_MASS_EV = (_c.m_e * _c.c**2).to_value(_u.eV)
#: Fine-structure constant.
ALPHA = float(_c.alpha)
#: Speed of light in km/s and Mpc/s.
C_KM_S = _c.c.to_value(_u.km / _u.s)
C_MPC_S = _c.c.to_value(_u.Mpc / _u.s)
#: Proton mass in g.
PROTON_MASS_G = _c.m_p.to_value(_u.g)
#: Mpc and pc in cm.
MPC_CM = _u.Mpc.to(_u.cm)
PC_CM = _u.pc.to(_u.cm)
#: Planck and Boltzmann constants in eV s and eV/K.
H_PLANCK_EV_S = _c.h.to_value(_u.eV * _u.s)
K_BOLTZMANN_EV_K = _c.k_B.to_value(_u.eV / _u.K)

#: m_gamma^2 per unit electron density: 4 pi alpha n_e / m_e, in eV^2 per cm^-3.
PLASMA_MASS2_PER_DENSITY = 4.0 * math.pi * ALPHA * HBAR_C_EV_CM**3 / ELECTRON_MASS_EV
