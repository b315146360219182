"""Physical constants used by towerflow's science, each with its unit and source.

Constants are plain module-level floats (never mutated). Where a published method fixes a
value (FAO-56's specific heat, for instance) the method's value is used and said so.
"""
from __future__ import annotations

__all__ = [
    "ZERO_CELSIUS",
    "GAS_CONSTANT",
    "MOLAR_MASS_DRY_AIR",
    "MOLAR_MASS_WATER",
    "GAS_CONSTANT_DRY_AIR",
    "GAS_CONSTANT_WATER_VAPOUR",
    "MOLAR_MASS_RATIO",
    "SPECIFIC_HEAT_AIR",
    "SPECIFIC_HEAT_DRY_AIR",
    "SPECIFIC_HEAT_WATER_VAPOUR",
    "LATENT_HEAT_OF_FUSION_0C",
    "HEAT_CAPACITY_DIFFERENCE_WATER_ICE",
    "VON_KARMAN",
    "GRAVITY",
    "SOLAR_CONSTANT",
    "SOLAR_CONSTANT_FAO56",
    "THOM_EXCESS_RESISTANCE_COEFFICIENT",
    "THOM_EXCESS_RESISTANCE_EXPONENT",
    "WATER_DENSITY",
    "SECONDS_PER_DAY",
]

#: Kelvin at 0 degC [K] (definition of the Celsius scale; scipy.constants.zero_Celsius).
ZERO_CELSIUS = 273.15

#: Molar gas constant [J mol-1 K-1] (CODATA 2018, exact since the 2019 SI redefinition).
GAS_CONSTANT = 8.31446261815324  # = N_A k_B exactly

#: Molar mass of dry air [kg mol-1] (Picard et al. 2008, Metrologia 45:149, CIPM-2007).
MOLAR_MASS_DRY_AIR = 28.96546e-3

#: Molar mass of water [kg mol-1] (Picard et al. 2008, CIPM-2007).
MOLAR_MASS_WATER = 18.01528e-3

#: Specific gas constant of dry air [J kg-1 K-1] = GAS_CONSTANT / MOLAR_MASS_DRY_AIR (287.05).
GAS_CONSTANT_DRY_AIR = GAS_CONSTANT / MOLAR_MASS_DRY_AIR

#: Specific gas constant of water vapour [J kg-1 K-1] = GAS_CONSTANT / MOLAR_MASS_WATER (461.5).
GAS_CONSTANT_WATER_VAPOUR = GAS_CONSTANT / MOLAR_MASS_WATER

#: Ratio of molar masses water / dry air [-] (0.622; Allen et al. 1998, FAO-56 eq. 8 uses 0.622).
MOLAR_MASS_RATIO = MOLAR_MASS_WATER / MOLAR_MASS_DRY_AIR

#: Specific heat of (moist) air at constant pressure used in the Penman–Monteith equation,
#: the psychrometric constant and the Obukhov length [J kg-1 K-1]
#: (Allen et al. 1998, FAO-56, eq. 8 and Box 6: cp = 1.013e-3 MJ kg-1 K-1).
SPECIFIC_HEAT_AIR = 1013.0

#: Specific heat of dry air [J kg-1 K-1] = 3.5 R_d, ideal diatomic gas (e.g. Wallace and
#: Hobbs 2006, Atmospheric Science, ch. 3; 1004.7).
SPECIFIC_HEAT_DRY_AIR = 3.5 * GAS_CONSTANT_DRY_AIR

#: Specific heat of water vapour [J kg-1 K-1] = 4 R_v, ideal triatomic gas (1846; the
#: measured value near 0 degC is about 1850-1870; Wallace and Hobbs 2006, ch. 3).
SPECIFIC_HEAT_WATER_VAPOUR = 4.0 * GAS_CONSTANT_WATER_VAPOUR

#: Latent heat of fusion of ice at 0 degC [J kg-1] (e.g. Rogers and Yau 1989, A Short
#: Course in Cloud Physics, Table 2.1: 0.3337 MJ kg-1).
LATENT_HEAT_OF_FUSION_0C = 0.3337e6

#: Specific heat of liquid water minus that of ice near 0 degC [J kg-1 K-1]
#: (4218 - 2106; Rogers and Yau 1989, Table 2.1), the temperature slope of the latent heat
#: of fusion by Kirchhoff's relation.
HEAT_CAPACITY_DIFFERENCE_WATER_ICE = 4218.0 - 2106.0

#: von Karman constant [-] (0.41; Allen et al. 1998, FAO-56 eq. 4; Hogstrom 1988, BLM 42:55).
VON_KARMAN = 0.41

#: Standard acceleration of gravity [m s-2] (CGPM 1901; scipy.constants.g).
GRAVITY = 9.80665

#: Total solar irradiance at 1 AU [W m-2] (Kopp and Lean 2011, GRL 38:L01706: 1360.8 +- 0.5).
SOLAR_CONSTANT = 1361.0

#: FAO-56 solar constant Gsc = 0.0820 MJ m-2 min-1 expressed in W m-2 (Allen et al. 1998,
#: eq. 21): 0.0820e6 / 60 = 1366.7 W m-2; offered for reproducing FAO-56 numbers.
SOLAR_CONSTANT_FAO56 = 0.0820e6 / 60.0

#: Thom's excess resistance ra_b = 6.2 u*^-0.67 [s m-1] (Thom 1972, QJRMS 98:124;
#: Thom 1975 in Monteith (ed.) Vegetation and the Atmosphere 1:57).
THOM_EXCESS_RESISTANCE_COEFFICIENT = 6.2
THOM_EXCESS_RESISTANCE_EXPONENT = -0.67

#: Density of liquid water used to turn kg m-2 into mm [kg m-3]: 1 kg m-2 = 1 mm
#: (Allen et al. 1998, FAO-56 ch. 1 uses 1000 kg m-3).
WATER_DENSITY = 1000.0

#: Seconds in a day [s].
SECONDS_PER_DAY = 86400.0
