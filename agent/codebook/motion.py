"""Motion classes from wrist ENMO cut-points, and the window features k-means motion uses."""

from __future__ import annotations

import math

# ENMO cut-points for the non-dominant wrist in adults, in milli-g.
# Sedentary below 44.8 mg: Hildebrand M, Hansen BH, van Hees VT, Ekelund U (2017)
#   "Evaluation of raw acceleration sedentary thresholds in children and adults",
#   Scand J Med Sci Sports 27(12):1814-1823.
# Moderate-to-vigorous at or above 100.6 mg: Hildebrand M, van Hees VT, Hansen BH,
#   Ekelund U (2014) "Age group comparability of raw accelerometer output from
#   wrist- and hip-worn monitors", Med Sci Sports Exerc 46(9):1816-1824.
# Both values are the ActiGraph wrist figures as quoted in public re-implementations
# of these papers (an R function `hildebrand2014(sed_cp = 44.8, mpa_cp = 100.6,
# vpa_cp = 428.8)`), found with our search tool; the primary tables were not read.
ENMO_SEDENTARY_MG = 44.8
ENMO_MVPA_MG = 100.6
MOTION_BANDS = ("sedentary", "light", "mvpa")

MOTION_BANDS = ("sedentary", "light", "mvpa")


# -- motion cut-points ---------------------------------------------------------------

def enmo_band(enmo_g: float) -> str:
    """Intensity band of a window's mean ENMO (in g) from the wrist cut-points above."""
    mg = float(enmo_g) * 1000.0
    if not math.isfinite(mg):
        raise ValueError(f"ENMO must be a finite number of g, got {enmo_g!r}")
    if mg < ENMO_SEDENTARY_MG:
        return "sedentary"
    if mg < ENMO_MVPA_MG:
        return "light"
    return "mvpa"


def motion_features(window) -> list[float]:
    """Window row ``[t, enmo_g, sd_g, dom_hz, active]`` to the k-means features."""
    return [float(window[1]), float(window[2]), float(window[3])]


