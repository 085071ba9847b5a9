"""Physical constants as CODATA literals (SI units).

Written out here rather than imported from :mod:`scipy.constants`, whose
import pulls in much of numpy's testing machinery and costs more than the
whole forward model of a ``predict`` run.  ``tests/test_constants.py``
checks every value against :mod:`scipy.constants`.

Values are those of CODATA 2022 (Mohr, Tiesinga, Newell and Taylor, Rev.
Mod. Phys. 97, 025002, 2025); the Planck constant, the elementary charge
and the speed of light are exact by the 2019 definition of the SI.
"""

__all__ = ["PLANCK_J_S", "ELEMENTARY_CHARGE_C", "ELECTRON_MASS_KG", "SPEED_OF_LIGHT_M_S"]

PLANCK_J_S = 6.62607015e-34          # h, exact
ELEMENTARY_CHARGE_C = 1.602176634e-19  # e, exact
SPEED_OF_LIGHT_M_S = 299792458.0     # c, exact
ELECTRON_MASS_KG = 9.1093837139e-31  # m_e, CODATA 2022, relative uncertainty 3.1e-10
