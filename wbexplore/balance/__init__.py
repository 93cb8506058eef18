"""The balance engine: pure computation on canonical basin series (no plots, no files)."""

from .closure import (UNIT_SYSTEMS, Selection, SelectionResult, component_terms, compute_selection, to_unit_system,
                      with_ensembles)
from .collocation import multiple_collocation, triple_collocation
from .combos import best_scores, best_selection, long_term_all, rank, rank_all
from .engine import closure_metrics, closure_terms
from .options import ClosureOptions
from .terms import BASE_TERMS, Term, balance_terms
from .correction import constrained_correction, correct_frame
from .lag import discharge_lag
from .metrics import METRICS, compute_metrics, kge, kge_prime, nse, pbias
from .storage import METHODS, fill_gaps, match_window, storage_change, window_closure
from .unknown import by_difference
from .estimate import DifferenceEstimate, estimate_by_difference
from .uncertainty import ProductError, product_disagreement, product_error

__all__ = [
    "ClosureOptions", "closure_terms", "closure_metrics", "Term", "BASE_TERMS", "balance_terms", "best_scores",
    "Selection", "SelectionResult", "compute_selection", "component_terms", "to_unit_system", "UNIT_SYSTEMS",
    "with_ensembles", "rank", "rank_all", "best_selection", "long_term_all", "METRICS", "compute_metrics", "kge", "kge_prime", "nse",
    "pbias", "METHODS", "storage_change", "match_window", "fill_gaps", "window_closure", "by_difference",
    "constrained_correction", "correct_frame", "triple_collocation", "discharge_lag", "multiple_collocation",
    "DifferenceEstimate", "estimate_by_difference", "ProductError", "product_error", "product_disagreement",
]
