"""Hyper-parameter searches as Hydra sweeps: search spaces and the Optuna search loop.

The Hydra side is the ``trials`` sweeper plugin in ``hydra_plugins.skymoments_trials``
(``hydra/sweeper=trials``, picked by the ``hparams_search`` configs); this package holds its
logic, usable without Hydra's plugin machinery.
"""

from skymoments.sweeps.space import SearchSpace, format_value, parse_search_space
from skymoments.sweeps.study import (
    RESULTS_FILE,
    SearchResult,
    make_study,
    objective_value,
    run_search,
    write_results,
)

__all__ = [
    "RESULTS_FILE",
    "SearchResult",
    "SearchSpace",
    "format_value",
    "make_study",
    "objective_value",
    "parse_search_space",
    "run_search",
    "write_results",
]
