"""Check values for the station-magnitude formulas and geometry, each block with its source.

Status labels as in docs/check-values.md: **verified** (read in the named source or run in the
named library), **computed** (from a verified formula, recomputed here), **from memory**,
**common practice, no source**. Tolerances follow the printed precision (docs/check-values.md §9):
1e-4 for values printed with four decimals, +/-0.1 for Q look-ups (the two digitisations of the
Gutenberg-Richter chart differ by 0.1).
"""

from __future__ import annotations

from typing import Final

# ---------------------------------------------------------------------------------------------
# docs/check-values.md §3, worked examples (computed from the §1 formulas; tolerance 1e-4, printed
# to 4 dp).
# ---------------------------------------------------------------------------------------------
WORKED_TOL: Final = 1e-4

#: ML, IASPEI form: (A in nm, hypocentral R in km, ML). #1: 1 mm on a Wood-Anderson record of
#: magnification 2080 at 100 km, Richter's ML 3 anchor [IASPEI-web]; #2-#4 [IASPEI-web].
ML_IASPEI: Final = (
    (1.0e6 / 2080.0, 100.0, 3.0009),
    (100.0, 10.0, 1.0389),
    (1000.0, 100.0, 3.3190),
    (5000.0, 500.0, 5.5498),
)

#: mb: (A nm, T s, distance deg, depth km, Q of docs/check-values.md §3, mb). #5, #6: mb form +
#: G&R Q (shallow table, h = 0: Q(50) = Q(80) = 6.7).
MB: Final = (
    (100.0, 1.0, 50.0, 0.0, 6.7, 5.7000),
    (50.0, 0.8, 80.0, 0.0, 6.7, 5.4959),
)

#: mB_BB: (Vmax nm/s, distance deg, depth km, Q, mB_BB). #7 [Entwistle-2017] + G&R Q(60) = 6.8.
MB_BB: Final = ((1000.0, 60.0, 0.0, 6.8, 6.0018),)

#: Ms_20: (A nm, T s, distance deg, Ms_20). #8 [IASPEI-2005]; #9 J. C. Lahr's "Surface Wave
#: Magnitude" sheet (verified table): A = 6.939373 um gives Ms = 5 at 20 deg, T = 20 s; the same
#: sheet lists 1.516142 um at 50 deg, 0.479767 um at 100 deg, 0.219883 um at 160 deg
#: (docs/check-values.md §3, "More from the same Lahr sheet"), all Ms_20 = 5.0000.
MS_20: Final = (
    (1000.0, 20.0, 50.0, 4.8193),
    (6939.373, 20.0, 20.0, 5.0000),
    (1516.142, 20.0, 50.0, 5.0000),
    (479.767, 20.0, 100.0, 5.0000),
    (219.883, 20.0, 160.0, 5.0000),
)

#: Ms_BB: (Vmax nm/s, distance deg, T s or NaN, Ms_BB, tolerance). #10 [H&O-2010], 1e-4;
#: Lahr's velocity column (20 deg, Ms = 5 -> 2.178963 um/s at T = 20 s) gives 4.9998
#: (docs/check-values.md §3: "Lahr's velocities are rounded"), also 1e-4.
MS_BB: Final = (
    (500.0, 10.0, float("nan"), 3.8608),
    (2178.963, 20.0, 20.0, 4.9998),
)

#: mb_Lg: (A nm, r km, gamma 1/km, mb_Lg). #11, #12: formula from memory (docs/check-values.md §1).
MB_LG: Final = (
    (100.0, 300.0, 0.0, 3.1934),
    (100.0, 300.0, 0.001, 3.3194),
)

#: Mw, IASPEI form (constant 9.1 from memory): (M0 N·m, Mw). #13, #14.
MW_IASPEI: Final = ((1.0e17, 5.2667), (3.98e17, 5.6666))

# ---------------------------------------------------------------------------------------------
# docs/check-values.md §5: pyrocko 2026.6.2 moment_tensor.moment_to_magnitude (Hanks & Kanamori
# 1979), source read and run (verified): (M0 N·m, HK79 Mw, IASPEI Mw). Offset 0.0333 at every
# moment. pyrocko is not installed here; the values are those printed in docs/check-values.md §5.
# ---------------------------------------------------------------------------------------------
MW_HK79: Final = (
    (1.0e13, 2.6333, 2.6000),
    (3.98e17, 5.6999, 5.6666),
    (1.0e20, 7.3000, 7.2667),
)
MW_HK79_OFFSET: Final = 0.0333

# ---------------------------------------------------------------------------------------------
# docs/check-values.md §1 notes and §4 table: Hutton & Boore (1987) original form (abstract
# verified) and the IASPEI form, for A in mm on Wood-Anderson 2080 (computed): (A mm, R km, HB87,
# IASPEI).
# ---------------------------------------------------------------------------------------------
HB87_VALUES: Final = (
    (1.0, 100.0, 3.0000, 3.0009),
    (1.0, 10.0, 1.7199, 1.7208),
    (1.0, 300.0, 3.9076, 3.9085),
    (0.1, 50.0, 1.5714, 1.5723),
    (10.0, 300.0, 4.9076, 4.9085),
)

# ---------------------------------------------------------------------------------------------
# docs/check-values.md §4: obspy 1.5.1 obspy.signal.invsim.estimate_magnitude(WOODANDERSON,
# 2*A_mm/1000, timespan, R) is Bakun & Joyner (1984) eq. 3 (source read and run, verified);
# identical to the formula to 1e-9 for timespans 0.05, 0.4, 2.0 s. Printed values: (A mm, R km,
# BJ84).
# ---------------------------------------------------------------------------------------------
OBSPY_TIMESPANS_S: Final = (0.05, 0.4, 2.0)
OBSPY_BJ84_TOL: Final = 1e-9
BJ84_PRINTED: Final = (
    (1.0, 100.0, 3.0000),
    (1.0, 10.0, 1.7291),
    (0.1, 50.0, 1.5485),
    (10.0, 300.0, 5.0791),
)

# ---------------------------------------------------------------------------------------------
# docs/check-values.md §2: Gutenberg & Richter (1956) Q for PZ, as listed on J. C. Lahr's "Computing
# body-wave (mb) magnitude" page (verified). Tolerance +/-0.1 (the digitisations differ by 0.1).
# ---------------------------------------------------------------------------------------------
Q_TOL: Final = 0.1
Q_DISTANCES_DEG: Final = (16, 20, 30, 40, 50, 60, 70, 80, 90, 100, 109)
Q_GR56_SHALLOW: Final = (5.9, 6.0, 6.6, 6.4, 6.7, 6.8, 6.9, 6.7, 7.0, 7.4, 8.0)
Q_CHART_H0: Final = (5.9, 6.1, 6.6, 6.4, 6.7, 6.9, 6.9, 6.7, 7.0, 7.3, 7.9)
Q_CHART_H500: Final = (6.4, 6.4, 6.3, 6.3, 6.2, 6.2, 6.3, 6.2, 6.7, 7.2, 7.8)

# ---------------------------------------------------------------------------------------------
# docs/check-values.md §1 notes (computed): the Ms distance term 1.66 log10(100) = 3.32 and
# 1.66 log10(20) = 2.15971; tabulated by Lahr's "Surface-wave magnitude distance factor" page.
# ---------------------------------------------------------------------------------------------
MS_DISTANCE_TERM: Final = ((100.0, 3.32), (20.0, 2.15971))

# ---------------------------------------------------------------------------------------------
# Geometry: obspy 1.5.1 geodetics as the reference (run in the tests, not printed here).
# Vincenty (1975) claims millimetre accuracy; tolerances: 1 mm distance, 1e-6 deg azimuth for
# pairs rotated so |lon2 - lon1| <= 180 deg; 5 cm without rotation (obspy's unwrapped longitude
# difference loosens its stopping rule; measured 2.5 cm worst case on 20,000 random pairs).
# ---------------------------------------------------------------------------------------------
GEODESIC_TOL_M: Final = 1e-3
GEODESIC_UNROTATED_TOL_M: Final = 0.05
AZIMUTH_TOL_DEG: Final = 1e-6

# ---------------------------------------------------------------------------------------------
# Yellowstone amplitude table (real data; Holt, Pechmann & Koper 2022, BSSA 112(2), 905-920;
# repository sgjholt/ynp_local_magnitude_recalibration, file
# catalogs/amplitudes/yellowstone.amps.clean.geobalanced.csv at commit 096cd30a37, per the data
# README). Column meaning verified in the same repository (catops/catops/cleanamps.py at commit
# 745e584694, create_mean_half_pp_amp_col): AmpE and AmpN are peak-to-peak Wood-Anderson
# amplitudes in mm, and halfAmpH = (AmpE + AmpN) / 4, the mean horizontal half peak-to-peak
# amplitude. Row, event and station counts: the data README.
#
# IASPEI/HB87 ML from halfAmpH (mm_wa) and Rhyp, minus the network's uncorrected station ML
# (SML - Corr), measured by magfuse on all 7,698 rows with a correction: median +0.1149, robust
# SD (1.4826 MAD) 0.2314. The network uses its own distance curve: a shift and a scatter are
# expected, not equality. Bounds = measured +/- about 0.02. Measured alternatives they reject:
# peak-to-peak taken as the amplitude (median +0.416), um read as nm (+0.433), epicentral instead
# of hypocentral distance (median +0.077, SD 0.190).
# ---------------------------------------------------------------------------------------------
YELLOWSTONE_ROWS: Final = 7728
YELLOWSTONE_EVENTS: Final = 1383
YELLOWSTONE_STATIONS: Final = 20
YELLOWSTONE_OFFSET_BOUNDS: Final = (0.09, 0.14)
YELLOWSTONE_SCATTER_BOUNDS: Final = (0.21, 0.25)
#: Rhyp = sqrt(Repi^2 + EqDep^2) holds to print precision (measured max 5e-10 km).
YELLOWSTONE_RHYP_TOL_KM: Final = 1e-6
