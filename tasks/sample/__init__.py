"""The sample stage: the cheap model's posterior by MCMC, or an imported chain, and its
convergence diagnostics.
"""

from __future__ import annotations

from ._chainfiles import (
    SUFFIXES,
    nonfinite_rows,
    read_chain_file,
    write_chain_csv,
    write_chain_npy,
)
from ._diagnostics import (
    DEFAULT_THRESHOLDS,
    burn_in_count,
    chain_to_array,
    diagnose,
    diagnose_chain,
    ess_bulk,
    ess_mean,
    ess_tail,
    mcse_mean,
    mcse_quantile,
    rhat,
)
from ._sampling import (
    DISTS,
    LIKELIHOODS,
    SAMPLERS,
    STATE_FORMAT,
    LogPosterior,
    Move,
    Prior,
    PriorSet,
    build_log_posterior,
    load_callable,
    plot_trace_pairs,
    sample,
)
from ._stage import (
    ConvergenceError,
    Observations,
    convergence_gate,
    observation_columns,
    read_observations,
    sample_stage,
)

__all__ = [
    "ConvergenceError",
    "convergence_gate",
    "DEFAULT_THRESHOLDS",
    "DISTS",
    "LIKELIHOODS",
    "LogPosterior",
    "Move",
    "Observations",
    "Prior",
    "PriorSet",
    "SAMPLERS",
    "STATE_FORMAT",
    "SUFFIXES",
    "build_log_posterior",
    "burn_in_count",
    "chain_to_array",
    "diagnose",
    "diagnose_chain",
    "ess_bulk",
    "ess_mean",
    "ess_tail",
    "load_callable",
    "mcse_mean",
    "mcse_quantile",
    "nonfinite_rows",
    "observation_columns",
    "plot_trace_pairs",
    "read_chain_file",
    "read_observations",
    "rhat",
    "sample",
    "sample_stage",
    "write_chain_csv",
    "write_chain_npy",
]
