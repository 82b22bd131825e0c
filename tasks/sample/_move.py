"""The extension point of the samplers: :class:`Move`, a base class with one hook.

To add a sampler, subclass :class:`Move` in a module of its own, set its class attributes
(``name``, ``ensemble``, ``symmetric``, ``uses_accept_prob``), implement :meth:`Move.propose`
with numpy (one path for any number of chains) and add the class to ``MOVES`` in
:mod:`winnow.tasks.sample._samplers`; then add the name to the ``sampler`` Literal of
:class:`winnow.tasks.config.SampleSettings` (``tests/test_sample_registry.py`` checks that
the two lists agree).

The driver (:func:`winnow.tasks.sample.sample`) evaluates the target, accepts with the
Metropolis-Hastings rule, records draws, reports progress and writes checkpoints; a move only
proposes. Ensemble moves (``ensemble = True``) update the chains in two halves: the proposal
for a chain in one half uses the current positions of the other half only, which keeps the
joint chain of all walkers invariant (Goodman & Weare 2010, Sec. 3; Foreman-Mackey et al.
2013, Sec. 3 "parallel stretch move"). Other moves get every chain at once.

All moves work in the unconstrained space of :mod:`winnow.tasks.sample._priors`.

References
----------
.. [1] Goodman, J., Weare, J. (2010). Ensemble samplers with affine invariance.
   Communications in Applied Mathematics and Computational Science 5(1), 65-80.
.. [2] Foreman-Mackey, D., Hogg, D. W., Lang, D., Goodman, J. (2013). emcee: the MCMC
   hammer. PASP 125, 306-312.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

__all__ = ["Move", "StepContext"]


@dataclass(slots=True)
class StepContext:
    """What a move may know about the step it proposes for.

    Attributes
    ----------
    iteration : int
        Iteration number (0-based) of the whole run.
    index : ndarray of int, shape (m,)
        Which chains are being updated: every chain for a move with ``ensemble = False``,
        one half of them for an ensemble move.
    adapting : bool
        True during burn-in; adaptation that would break the Markov property of the kept
        draws must only happen then.
    accept_prob : ndarray, shape (m,), or None
        Acceptance probability of these chains' previous step (None on the first step,
        and for a move whose ``uses_accept_prob`` is False).
    burn_in : int
        Iterations of the run that are burn-in.
    group : int
        Which group of chains (0, or 0 and 1 for the two halves of an ensemble).
    block : int
        At the first iteration the driver runs in a block of iterations, the block's
        length: the move draws the random numbers of this group for the whole block at
        once from the ``rng`` it is given (see :meth:`Move._ahead`); 0 elsewhere.
    block_start : int
        First iteration of the current block.
    """

    iteration: int
    index: np.ndarray
    adapting: bool
    accept_prob: np.ndarray | None
    burn_in: int = 0
    group: int = 0
    block: int = 0
    block_start: int = 0


class Move(ABC):
    """Base class of the samplers: one hook, :meth:`propose`.

    A move keeps any adaptation state in ``self.state`` (a dict of arrays), which the driver
    saves in checkpoints and restores on resume.

    Parameters
    ----------
    d : int
        Dimension.
    n_chains : int
        Number of chains (walkers).
    initial_scale : ndarray, shape (d,)
        A rough scale of each coordinate (from the priors), for moves that need one.
    """

    name: ClassVar[str] = ""
    #: True for moves that update the chains in two halves using the other half.
    ensemble: ClassVar[bool] = False
    #: False for moves that never read ``ctx.accept_prob`` (the driver then skips it).
    uses_accept_prob: ClassVar[bool] = True
    #: True for moves whose proposal is symmetric: their log proposal ratio is always 0.
    symmetric: ClassVar[bool] = False

    def __init__(self, d: int, n_chains: int, initial_scale: np.ndarray) -> None:
        self.d = d
        self.n_chains = n_chains
        self.initial_scale = np.asarray(initial_scale, dtype=np.float64)
        self.state: dict[str, np.ndarray] = {}
        # Random numbers drawn ahead, per group: (first iteration, length, arrays).
        self._drawn: dict[int, tuple[int, int, tuple[np.ndarray, ...]]] = {}
        self._zeros: dict[int, np.ndarray] = {}

    def _no_ratio(self, m: int) -> np.ndarray:
        """A read-only zero log proposal ratio for ``m`` chains (a symmetric proposal)."""
        z = self._zeros.get(m)
        if z is None:
            z = self._zeros[m] = np.zeros(m)
            z.flags.writeable = False
        return z

    def _ahead(
        self,
        ctx: StepContext,
        rng: np.random.Generator,
        draw: Callable[[np.random.Generator, int], tuple[np.ndarray, ...]],
    ) -> tuple[np.ndarray, ...]:
        """This iteration's random numbers, drawn a block of iterations at a time.

        ``draw(rng, n)`` returns arrays whose first axis is the iteration (length ``n``).
        Drawing a block at once replaces many small calls to the generator by one (a
        per-call cost that dominates for a handful of chains); the numbers do not depend
        on the chains' positions, so drawing them early changes nothing else. The driver
        gives each block its own generator (a resumed run redraws the block it starts in);
        a move must draw its random numbers here only. Outside a block (a move called on
        its own) one iteration is drawn at a time.
        """
        t = ctx.iteration
        got = self._drawn.get(ctx.group)
        if ctx.block > 0:
            got = (ctx.block_start, ctx.block, draw(rng, ctx.block))
            self._drawn[ctx.group] = got
        elif got is None or not got[0] <= t < got[0] + got[1]:
            got = (t, 1, draw(rng, 1))
            self._drawn[ctx.group] = got
        j = t - got[0]
        return tuple([a[j] for a in got[2]])

    @abstractmethod
    def propose(
        self,
        x: np.ndarray,
        others: np.ndarray,
        rng: np.random.Generator,
        ctx: StepContext,
    ) -> tuple[np.ndarray, np.ndarray]:
        """Propose new positions for the chains being updated.

        Parameters
        ----------
        x : ndarray, shape (m, d)
            Current positions of the chains in ``ctx.index``.
        others : ndarray, shape (r, d)
            Current positions of the complementary chains (ensemble moves), else empty.
        rng : numpy.random.Generator
        ctx : StepContext

        Returns
        -------
        proposal : ndarray, shape (m, d)
        log_q_ratio : ndarray, shape (m,)
            ``log q(x | y) - log q(y | x)`` (zero for a symmetric proposal).
        """
