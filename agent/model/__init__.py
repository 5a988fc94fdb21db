"""The memory model: cue-biased leading eigenvector retrieval, softmax choice, fitting.

Public entry points (``docs/model.md``):

* :func:`fit_model`, :func:`fit_from_home`, :class:`FitResult` -- fitting and reporting;
* :func:`recover` -- parameter recovery;
* :class:`RankOneSolver` and the reference solvers :func:`dense_activation`,
  :func:`power_activation`, :func:`eigsh_activation`;
* :class:`ModelGraph`, :class:`TrialDesign`, :func:`join_answers` -- inputs.
"""

from .design import ModelGraph, TrialDesign, as_model_graph, join_answers
from .fit import FitResult, fit_from_home, fit_model, render_table
from .recovery import recover, recovery_text
from .retrieval import dense_activation, eigsh_activation, power_activation
from .secular import RankOneSolver, fast_activation

__all__ = [
    "ModelGraph", "TrialDesign", "as_model_graph", "join_answers",
    "FitResult", "fit_from_home", "fit_model", "render_table",
    "recover", "recovery_text",
    "dense_activation", "eigsh_activation", "power_activation",
    "RankOneSolver", "fast_activation",
]
