"""Thin a posterior chain to a few weighted points by minimising MMD (the thin stage).

From a chain of ``N`` rows (``N`` up to 10^7, dimension up to 50) choose ``m`` distinct rows and
weights whose weighted empirical distribution is close to the whole chain in maximum mean
discrepancy (MMD, Gretton et al. 2012), without gradients of the posterior and without an
``N x N`` kernel matrix:

1. rows with NaN/inf are dropped (counted) or refused; each parameter is standardised (mixed
   units); repeated rows (Metropolis rejections) are merged, their multiplicity kept as weight;
2. the kernel bandwidth defaults to the median pairwise distance of a random subsample
   (Gretton et al. 2012, Section 8);
3. the kernel is replaced by random Fourier features (Rahimi & Recht 2007; orthogonal, Yu et
   al. 2016; quasi-Monte Carlo, Avron et al. 2016); the mean embedding of the whole chain is
   streamed in chunks; ``n_features="auto"`` doubles the feature count until the MMD estimates
   of independent feature draws agree to ``features_tol``;
4. a selector (greedy / kernel herding, Chen, Welling & Smola 2010, Riabiz et al. 2022; swap
   local search; genetic algorithm; random and stride baselines) picks the rows from a pool of
   candidate distinct rows;
5. weights are uniform or the exact simplex-constrained minimiser of the feature-space MMD;
   with the latter, chosen points left without weight (``w_i <= 1e-6 / m``) are replaced by
   the selector's next choices until every point carries weight, or left out (and counted as
   budget saved) when replacements get no weight either, so no costly run is wasted;
6. the result is checked with the exact-kernel MMD against the chain (chunked; on a stated
   random subsample above ``exact_max_rows`` rows).

References
----------
.. [1] Rahimi, A. and Recht, B. (2007). Random features for large-scale kernel machines.
   NeurIPS 20.
.. [2] Yu, F. X. et al. (2016). Orthogonal random features. NeurIPS 29.
.. [3] Avron, H., Sindhwani, V., Yang, J. and Mahoney, M. W. (2016). Quasi-Monte Carlo feature
   maps for shift-invariant kernels. JMLR 17(120).
.. [4] Chen, Y., Welling, M. and Smola, A. (2010). Super-samples from kernel herding. UAI.
.. [5] Gretton, A. et al. (2012). A kernel two-sample test. JMLR 13, 723-773.
.. [6] Riabiz, M. et al. (2022). Optimal thinning of MCMC output. JRSS-B 84(4), 1059-1081.
.. [7] Rasmussen, C. E. and Williams, C. K. I. (2006). Gaussian Processes for Machine
   Learning. MIT Press.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt

from winnow.tasks.config import ThinSettings
from winnow.tasks.records import Chain, Selection

from ._options import _validate_int, _validate_samples, thin_options
from ._progress import Progress
from ._run import run

__all__ = ["thin"]


def thin(
    samples: npt.ArrayLike | Chain,
    budget: int,
    *,
    rng: np.random.Generator | int | None = None,
    progress: Progress | None = None,
    settings: ThinSettings | None = None,
    **options: Any,
) -> Selection:
    """Choose ``budget`` distinct weighted rows whose distribution is closest to the chain.

    Parameters
    ----------
    samples : array_like, shape (n, d), or Chain
        Chain rows in user units (a :class:`Chain` uses ``.samples``).
    budget : int
        Number of points ``m`` (1 <= m <= number of distinct finite rows).
    rng : int or Generator, optional
        Seed; the same input, settings and seed give the same selection.
    progress : callable, optional
        ``progress(done, total, step)`` during every long step, each under its own name
        (preparing the chain, automatic feature count, feature pass, candidate features,
        selection, weight solve, exact MMD check, replacement rounds); ``done`` increases
        within a step, at most once per 1 % and per 0.5 s (whichever is rarer) besides the
        step's first and last call.
    settings : ThinSettings or ThinOptions, optional
        The thin stage's settings (a study's ``config.thin``); ``options`` override them.
    **options
        Any field of :class:`~winnow.tasks.config.ThinOptions` (the study settings
        :class:`~winnow.tasks.config.ThinSettings` plus ``nonfinite``, ``standardise``,
        ``chunk_size``, ``n_candidates``, ``features_tol``, ``precision``, ``workers``;
        each field's description says what it does and its default), ``n_features`` for
        ``features``; every other keyword is an option of the selector (swap:
        ``max_sweeps``; genetic: ``population``, ``generations``, ``patience``, ``elite``,
        ``tournament``, ``mutation_rate``, ``shortlist``, ``shortlist_share``, ``keep``).
        A bad value raises :class:`~winnow.tasks.errors.InputError` naming the keyword,
        the expected and the given value.

    Returns
    -------
    Selection
        Indices into the rows of ``samples`` as given, weights, points in user units, both
        MMDs and a report (the settings as validated, rows dropped, distinct rows,
        standardisation, bandwidth rule, feature-count history, ``weighted_points``: how
        many points carry weight, the replacement rounds, the budget saved and why;
        timings). ``m`` is ``budget`` unless points without weight could not be replaced
        (``report["weighted_points"]``).

    Notes
    -----
    ``features="auto"`` doubles the number of random frequencies ``D`` (the feature vector
    has ``2 D`` entries) from 64 until independent feature draws agree on the pilot MMD to
    within ``features_tol`` (relative) and that MMD changed by at most ``features_tol``
    since the previous doubling (see the report's ``auto_features_history``); the count is
    capped at 8192 frequencies and by 512 MB of features. The default ``features_tol`` 0.05
    is the value at which the benchmark's greedy/swap selections come within ~15 % of an
    exact-kernel greedy at m = 100.

    The exact check costs about ``exact_max_rows^2 / 2`` kernel values: the default 20,000
    takes ~1 s, a few % of a default thin of a 400,000 x 4 chain (100,000 took 19-23 s,
    about half of it). On a subsample the MMD^2 estimate is unbiased for the whole chain's
    and the report's ``mmd_exact_error`` states its standard error and an approximate 95 %
    interval (U-statistic variance, Gretton et al. 2012, Corollary 16).

    References
    ----------
    Rahimi & Recht (2007); Yu et al. (2016); Avron et al. (2016); Chen, Welling & Smola (2010);
    Gretton et al. (2012); Riabiz et al. (2022).
    """
    x = _validate_samples(samples)
    m = _validate_int("budget", budget, 1)
    s, method_options = thin_options(settings, options)
    return run(x, m, s, method_options, rng, progress)
