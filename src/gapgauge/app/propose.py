"""The propose job: the current prior from the store (:func:`gapgauge.app.prior.current_prior`), the
next hardware trials from it (:func:`gapgauge.compare.propose.propose`), the stop rule after the trials
so far (:func:`gapgauge.compare.stop.stop_rule`, in the result's ``stop``), the result stored (kind
``"proposals"``, read back by the report) and returned."""

from __future__ import annotations

from pathlib import Path

from threadpoolctl import threadpool_limits

from ..compare.linalg import FIT_BLAS_THREADS
from ..compare.propose import Proposals, check_arguments
from ..compare.propose import propose as propose_from_prior
from ..compare.stop import DEFAULT_STOP_LEVEL, check_stop_options, stop_rule
from ..progress import Progress
from ..scenario import Scenario
from ..store import Store
from .common import as_scenario, open_store
from .prior import current_prior


def propose(
    scenario: Scenario | str | Path,
    store: Store | str | Path,
    *,
    count: int = 1,
    max_fall_risk: float = 0.05,
    seed: int = 0,
    stop_epsilon: float | None = None,
    stop_level: float = DEFAULT_STOP_LEVEL,
    progress: Progress | None = None,
) -> Proposals:
    """Propose ``count`` hardware trials for ``scenario`` and store them.

    Args:
        scenario: a Scenario or the path of its TOML (its safe bounds confine the proposals).
        store: an open :class:`~gapgauge.store.Store` (left open) or the path of its file.
        count: number of proposals (a batch by kriging believer when > 1).
        max_fall_risk: the highest modelled fall probability allowed, in (0, 1].
        seed: seed of the candidate sets (and of a refit, if the stored prior is out of date) and of the
            stop rule's draws.
        stop_epsilon: the stop rule's regret allowed, objective units (None: its default, a share of the
            simulated objective's spread).
        stop_level: the stop rule stops at this probability, in (0, 1).
        progress: passed to a refit of the prior (see :mod:`gapgauge.progress`).

    Raises:
        ModelError: a bad argument, no sweep to fit a prior on, or no candidate under the limit.
    """
    check_arguments(count, max_fall_risk, seed)
    check_stop_options(stop_epsilon, stop_level)
    scenario = as_scenario(scenario)
    # one BLAS thread: these products are small, and OpenBLAS's spinning threads on shared cores doubled the
    # CPU time of a propose after a new trial (2.5 s against 1.2 s, measured under a load of 8 on 2 cores)
    with open_store(store, scenario=scenario) as opened, threadpool_limits(limits=FIT_BLAS_THREADS, user_api="blas"):
        prior = current_prior(scenario, opened, seed=seed, progress=progress)
        result = propose_from_prior(scenario, prior, count=count, max_fall_risk=max_fall_risk, seed=seed)
        result.stop = stop_rule(prior, epsilon=stop_epsilon, level=stop_level, seed=seed)
        opened.save_result(scenario.content_hash, result)
    return result


__all__ = ["propose"]
