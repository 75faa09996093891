"""The propose job: the current prior from the store (:func:`gapgauge.app.prior.current_prior`), the
next hardware trials from it (:func:`gapgauge.compare.propose.propose`), the result stored (kind
``"proposals"``, read back by the report) and returned."""

from __future__ import annotations

from pathlib import Path

from ..compare.propose import Proposals, check_arguments
from ..compare.propose import propose as propose_from_prior
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
    progress: Progress | None = None,
) -> Proposals:
    """Propose ``count`` hardware trials for ``scenario`` and store them.

    Args:
        scenario: a Scenario or the path of its TOML (its safe bounds confine the proposals).
        store: an open :class:`~gapgauge.store.Store` (left open) or the path of its file.
        count: number of proposals (a batch by kriging believer when > 1).
        max_fall_risk: the highest modelled fall probability allowed, in (0, 1].
        seed: seed of the candidate sets (and of a refit, if the stored prior is out of date).
        progress: passed to a refit of the prior (see :mod:`gapgauge.progress`).

    Raises:
        ModelError: a bad argument, no sweep to fit a prior on, or no candidate under the limit.
    """
    check_arguments(count, max_fall_risk, seed)
    scenario = as_scenario(scenario)
    with open_store(store) as opened:
        prior = current_prior(scenario, opened, seed=seed, progress=progress)
        result = propose_from_prior(scenario, prior, count=count, max_fall_risk=max_fall_risk, seed=seed)
        opened.save_result(scenario.content_hash, result)
    return result


__all__ = ["propose"]
