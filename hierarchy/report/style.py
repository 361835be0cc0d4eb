"""The look every picture of a design or study shares: the colours and line
styles of link kinds, line widths and fonts (the encoding is described in
:mod:`hierarchy.report.drawing`)."""

from __future__ import annotations

__all__ = ["RESIDUAL_COLOUR", "PREDICTION_COLOUR", "SILENT_COLOUR", "RESIDUAL_STYLE", "PREDICTION_DASHES", "SILENT_DASHES", "SENSOR_FILL", "MIN_WIDTH", "MAX_WIDTH", "SILENT_WIDTH"]

# Okabe & Ito (2008), "Color Universal Design": blue and vermillion are told
# apart by every common kind of colour-blindness.
RESIDUAL_COLOUR = "#0072B2"
PREDICTION_COLOUR = "#D55E00"
SILENT_COLOUR = "#999999"
RESIDUAL_STYLE = "solid"
PREDICTION_DASHES = (7.0, 3.0, 1.5, 3.0)  # dash-dot, in points at 1 pt width
SILENT_DASHES = (3.0, 3.0)  # dashed
SENSOR_FILL = "#E6E6E6"

MIN_WIDTH = 1.0  # points, for a link that sends nothing
MAX_WIDTH = 8.0  # points, for the largest power (or share) in the picture
SILENT_WIDTH = 0.9

_FONT = 9.0
_LINK_FONT = 7.0
