"""Constants of the 21 cm line, without numpy: the configuration's defaults read them on the
path every command takes (``spinflip --help`` and the control client need no numpy).
:mod:`spinflip.daemon.sky.hi_line` re-exports them beside the radio velocity convention.

References
----------
Hellwig, H. et al. 1970, IEEE Trans. Instrum. Meas. 19, 200 (HI hyperfine frequency; value
quoted from memory).
Dickey, J. M. & Lockman, F. J. 1990, ARA&A 28, 215 (N_HI = 1.823e18 int T_B dv, optically
thin).
"""

#: Rest frequency of the HI hyperfine (spin-flip) transition, Hz (Hellwig et al. 1970).
HI_REST_FREQ_HZ = 1_420_405_751.768

#: Speed of light in vacuum, m/s (exact, SI).
C_M_S = 299_792_458.0

#: HI column density per unit line integral, cm^-2 per (K km/s), optically thin
#: (Dickey & Lockman 1990): N_HI = 1.823e18 int T_B dv.
HI_COLUMN_PER_K_KM_S_CM2 = 1.823e18
