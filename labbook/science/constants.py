"""Physical constants and exact unit factors used across ``labbook.science``.

The three defining constants below are *exact* by definition in the SI since its 2019
revision (BIPM, SI Brochure, 9th edition, 2019). They are typed in here rather than taken
from ``scipy.constants`` so that scipy is not a runtime dependency of ``labbook.science``;
the tests compare them with ``scipy.constants``.
"""

from __future__ import annotations

#: Elementary charge e in coulomb (exact, SI 2019).
ELEMENTARY_CHARGE_C: float = 1.602176634e-19

#: Boltzmann constant k_B in J/K (exact, SI 2019).
BOLTZMANN_J_PER_K: float = 1.380649e-23

#: Avogadro constant N_A in 1/mol (exact, SI 2019).
AVOGADRO_PER_MOL: float = 6.02214076e23

#: Standard atmosphere in Pa (exact by definition, CGPM 1954).
ATM_PA: float = 101_325.0

#: 1 Torr = 1/760 atm in Pa (exact by definition). Not the same as the conventional
#: millimetre of mercury (133.322387415 Pa); the two differ by 1.4e-7 relative.
TORR_PA: float = ATM_PA / 760.0

#: 1 mbar in Pa (exact).
MBAR_PA: float = 100.0

#: 1 Langmuir = 1e-6 Torr·s (exact by definition; Lüth, *Surfaces and Interfaces of Solid
#: Materials*), expressed in Pa·s.
LANGMUIR_PA_S: float = 1e-6 * TORR_PA

#: 1 Langmuir in mbar·s (= 1.333224e-6 mbar·s).
LANGMUIR_MBAR_S: float = LANGMUIR_PA_S / MBAR_PA

#: 0 °C in kelvin (exact by definition of the Celsius scale).
ZERO_CELSIUS_K: float = 273.15
