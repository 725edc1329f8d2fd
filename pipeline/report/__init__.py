"""pipeline.report: the pass report, ``report.json`` and a self-contained ``report.html`` with plots.

See DEVELOPERS.md ("pipeline.report") for what the decode chain passes in.
"""

from pipeline.report._build import CAUTION, SCHEMA_VERSION, RunFacts, build_report
from pipeline.report._html import KNOWN_SECTIONS, MAX_TABLE_ROWS, jsonable, render_html, write_report
from pipeline.report._plots import MAX_CONSTELLATION_POINTS, Figure, PlotData, render_plots
from pipeline.report._quality import BitErrorEstimate, bit_error_estimate, bit_error_series
from pipeline.report._waterfall import Waterfall, waterfall_row_samples

__all__ = [
    "Waterfall",
    "waterfall_row_samples",
    "CAUTION",
    "SCHEMA_VERSION",
    "RunFacts",
    "build_report",
    "BitErrorEstimate",
    "bit_error_estimate",
    "bit_error_series",
    "Figure",
    "KNOWN_SECTIONS",
    "MAX_CONSTELLATION_POINTS",
    "MAX_TABLE_ROWS",
    "PlotData",
    "jsonable",
    "render_html",
    "render_plots",
    "write_report",
]
