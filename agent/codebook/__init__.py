"""Codebooks: features in, coarse stable IDs out (``docs/graph.md``, Codebook).

Terminology
-----------
place
    A cluster of stay points found by DBSCAN on the haversine metric; ID
    ``P1``, ``P2``, ...  A stay within ``place_radius_m`` of no known place is
    *pending* until ``place_min_stays`` stays confirm a new place.
sound class
    A k-means cluster of standardised audio feature vectors; ID ``S1``, ...
motion class
    Either an ENMO intensity band from published wrist cut-points
    (``sedentary``, ``light``, ``mvpa``) or a k-means cluster of accelerometry
    window features (``M1``, ...), as ``policy.codebook.motion_method`` says.
stable ID
    Once an ID has been handed out it keeps its meaning.  A refit maps new
    clusters onto existing IDs by Hungarian matching on centroids
    (:func:`scipy.optimize.linear_sum_assignment`) behind a distance gate;
    unmatched clusters get fresh IDs (never reused), and merges and splits are
    appended to the codebook's ``history`` instead of relabelling anything
    already coded.

The codebooks (centroids, scaler parameters, ID map, history) are stored
encrypted in the vault table ``codebook`` under the rids ``place``, ``sound``
and ``motion`` and are never exported.

Modules: :mod:`.places` (DBSCAN places), :mod:`.sounds` (k-means classes with
stable IDs, for sounds and k-means motion), :mod:`.motion` (ENMO cut-points),
:mod:`.run` (the coding stage over the vault; episodes are built afterwards by
:mod:`agent.episodes`).
"""

from __future__ import annotations

from .motion import ENMO_MVPA_MG, ENMO_SEDENTARY_MG, MOTION_BANDS, enmo_band, motion_features
from .places import PlaceCodebook, cluster_places, spherical_mean
from .run import CodebookReport, codebook_quality, run_codebook
from .sounds import CentroidCodebook

__all__ = ["ENMO_MVPA_MG", "ENMO_SEDENTARY_MG", "MOTION_BANDS", "CentroidCodebook", "CodebookReport", "PlaceCodebook",
           "cluster_places", "codebook_quality", "enmo_band", "motion_features", "run_codebook", "spherical_mean"]
