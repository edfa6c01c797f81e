"""Station magnitudes from amplitude readings: IASPEI standard formulas, vectorized.

Pure functions, one per scale, with units and validity domains in their docstrings; each has an
``evaluate_*`` twin returning an :class:`Evaluation` (value plus per-input domain reason) for
batch use, and :func:`compute_station_magnitudes` runs them on record-schema frames.

========== ==================================== ============================================
scale      function                             module (equation, ranges, sources, status)
========== ==================================== ============================================
ML         :func:`ml`                           :mod:`stations.formulas.local`
mb, mB_BB  :func:`mb`, :func:`mb_bb`            :mod:`stations.formulas.body`
Ms_20,     :func:`ms_20`, :func:`ms_bb`         :mod:`stations.formulas.surface`
Ms_BB
mb_Lg      :func:`mb_lg` (from memory)          :mod:`stations.formulas.regional`
Mw         :func:`mw`                           :mod:`stations.formulas.moment`
========== ==================================== ============================================

Units (:mod:`stations.formulas.units`) are explicit: each function takes ``unit=`` and refuses a
unit of the wrong kind with :class:`~stations.errors.UnitError`. Out-of-domain inputs follow
``policy=`` (:mod:`stations.formulas.domain`). Tables: Q(Δ, h) in
:mod:`stations.formulas.qtable`, -log A0(R) in :mod:`stations.formulas.local`.
"""

from stations.formulas.batch import (
    OUT_OF_DOMAIN_FLAG,
    REJECTED_COLUMNS,
    ComputeOptions,
    ComputeResult,
    compute_station_magnitudes,
)
from stations.formulas.body import evaluate_mb, evaluate_mb_bb, mb, mb_bb
from stations.formulas.domain import DomainPolicy, Evaluation, OutOfDomainWarning
from stations.formulas.local import (
    BJ84,
    DISTANCE_CORRECTIONS,
    HB87,
    HB87_MM,
    DistanceCorrection,
    evaluate_ml,
    ml,
    read_distance_correction_csv,
)
from stations.formulas.moment import evaluate_mw, mw
from stations.formulas.qtable import GR56_CHART_Q, GR56_Q, Q_TABLES, QTable
from stations.formulas.regional import evaluate_mb_lg, mb_lg
from stations.formulas.surface import evaluate_ms_20, evaluate_ms_bb, ms_20, ms_bb
from stations.formulas.units import convert_amplitude

__all__ = [
    "BJ84",
    "DISTANCE_CORRECTIONS",
    "GR56_CHART_Q",
    "GR56_Q",
    "HB87",
    "HB87_MM",
    "OUT_OF_DOMAIN_FLAG",
    "Q_TABLES",
    "REJECTED_COLUMNS",
    "ComputeOptions",
    "ComputeResult",
    "DistanceCorrection",
    "DomainPolicy",
    "Evaluation",
    "OutOfDomainWarning",
    "QTable",
    "compute_station_magnitudes",
    "convert_amplitude",
    "evaluate_mb",
    "evaluate_mb_bb",
    "evaluate_mb_lg",
    "evaluate_ml",
    "evaluate_ms_20",
    "evaluate_ms_bb",
    "evaluate_mw",
    "mb",
    "mb_bb",
    "mb_lg",
    "ml",
    "ms_20",
    "ms_bb",
    "mw",
    "read_distance_correction_csv",
]
