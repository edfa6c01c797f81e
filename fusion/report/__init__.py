"""Per-station reliability report and the event picture.

- :func:`write_station_report` writes the station table (CSV and Parquet through a declared
  Arrow schema) and one self-contained HTML file for a station model and the events of a
  window; :class:`ReportInputs` holds its input tables (columns:
  :mod:`fusion.report.inputs`), :func:`report_inputs_from_parameters` builds them from
  :class:`~fusion.model.parameters.StationParameters` and
  :class:`~fusion.network.network_magnitude.FusedMagnitudes`.
- :func:`station_reliability_table` computes the table alone (no files, no figures).
- :func:`render_event_figure` draws one event's station magnitudes, weights and network
  magnitude as PNG or as a self-contained HTML page; :func:`write_event_figure` writes it for
  an explained event (``magfuse event --png/--html``).

The report is a pure function of its inputs; it reads no store and fits nothing. Its output is
advisory (:data:`fusion.advisory.ADVISORY`, printed in every page).
"""

from fusion.report.event_figure import render_event_figure, write_event_figure
from fusion.report.inputs import ReportInputs, report_inputs_from_parameters
from fusion.report.station_table import (
    STATION_REPORT_SCHEMA,
    StationFlag,
    station_reliability_table,
)
from fusion.report.writer import ReportFiles, write_station_report

__all__ = [
    "STATION_REPORT_SCHEMA",
    "ReportFiles",
    "ReportInputs",
    "StationFlag",
    "render_event_figure",
    "report_inputs_from_parameters",
    "station_reliability_table",
    "write_event_figure",
    "write_station_report",
]
