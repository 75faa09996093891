"""The prior job: read the sweep and the trials from the store once, fit the multi-fidelity prior and the
fall model (:func:`gapgauge.compare.prior.fit_prior`), store the result with its models.

The stored prior is one row of kind ``"prior"``: the :class:`~gapgauge.compare.prior.PriorFit` JSON
(so ``store.load_result(PriorFit, hash)`` reads it without the models) plus the models' parameters
under ``"models"`` and their npz arrays (:func:`load_prior` rebuilds them without refitting).

When the sweep has not changed since the stored fit, its simulation levels are reused and only the
hardware levels refitted: a new trial costs seconds, not a refit of every rollout. Whether it changed
is told without reading it: :func:`sweep_state` keys the sweep's rows by the store's run counts
(about 0.1 s at 10^6 rows, where reading and hashing them takes seconds). When that key differs (a
sweep grew, or a prior stored before this key existed) the rows are read and their content hash
(:attr:`PriorFit.simulation_key`) decides, so an unchanged sweep is still never refitted.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

from ..compare.prior import (
    HardwareData,
    PriorData,
    PriorFit,
    hardware_data,
    inducing_for,
    prior_data,
    refit_hardware,
)
from ..compare.prior import fit_prior as fit_prior_data
from ..errors import ModelError, StoreError
from ..progress import Progress
from ..scenario import Scenario
from ..store import Store
from .common import as_scenario, open_store


def read_prior_data(scenario: Scenario, store: Store) -> PriorData:
    """The arrays of :func:`~gapgauge.compare.prior.prior_data` from an open ``store``.

    Raises:
        ModelError: no sweep for the scenario yet, or no rollout that stood.
    """
    h = scenario.content_hash
    sweep = store.rollouts(h, kinds=("sweep",)) if store.runs(h, kind="sweep") else None
    return prior_data(scenario, sweep, list(store.trials(h)))


def read_hardware_data(scenario: Scenario, store: Store) -> HardwareData:
    """The trials' arrays (:func:`~gapgauge.compare.prior.hardware_data`) from an open ``store``."""
    return hardware_data(scenario, list(store.trials(scenario.content_hash)))


def sweep_state(scenario: Scenario, store: Store) -> str:
    """A key of the sweep rows :func:`read_prior_data` would read, from the store's runs and row counts
    (:meth:`~gapgauge.store.Store.rollouts_state`) and the scenario's content hash, without reading them.

    Taken before the rows are read: a sweep that writes in between makes the key older than the rows,
    so the next call reads again (never the reverse, which would keep a stale simulation level).
    """
    rows = store.rollouts_state(scenario.content_hash, kinds=("sweep",))
    return hashlib.sha256(f"{scenario.content_hash}:{rows}".encode()).hexdigest()


def _refit(scenario: Scenario, store: Store, stored: PriorFit | None, state: str, seed: int,
           max_inducing: int | None, progress: Progress | None) -> PriorFit:
    """A new fit: the hardware levels alone when ``stored`` was fitted on the sweep as it stands (its
    ``sweep_state`` is ``state``); else from the rows, reusing ``stored``'s simulation levels if its content
    key matches."""
    if stored is not None and stored.sweep_state == state:
        return refit_hardware(scenario, stored, read_hardware_data(scenario, store), progress=progress)
    data = read_prior_data(scenario, store)
    return fit_prior_data(scenario, data, seed=seed, max_inducing=max_inducing, simulation_level=stored,
                          sweep_state=state, progress=progress)


def _stored(scenario: Scenario, store: Store) -> PriorFit | None:
    """The stored prior with its models, or None when there is none or it cannot be restored (an older
    format, other parameters): the caller then fits a new one."""
    loaded = store.load_model(PriorFit.kind, scenario.content_hash)
    if loaded is None:
        return None
    try:
        return PriorFit.from_state(loaded[0], loaded[1] or {}, scenario)
    except (ModelError, StoreError, KeyError):
        return None


def save_prior(store: Store, fit: PriorFit) -> int:
    """Store ``fit`` and its models as one row of kind ``"prior"``; sets and returns ``fit.model_id``."""
    params, arrays = fit.to_state()
    fit.model_id = store.save_model(PriorFit.kind, fit.scenario_hash, params, arrays)
    return fit.model_id


def load_prior(scenario: Scenario | str | Path, store: Store | str | Path) -> PriorFit:
    """The last prior stored for ``scenario``, models rebuilt from their JSON and npz without refitting.

    Raises:
        ModelError: none stored yet, or stored for other parameters (fit one with ``fit_prior``).
        StoreError: the stored prior is of an older format (fit it again).
    """
    scenario = as_scenario(scenario)
    with open_store(store, scenario=scenario) as opened:
        loaded = opened.load_model(PriorFit.kind, scenario.content_hash)
    if loaded is None:
        raise ModelError(f"no fitted prior for scenario {scenario.name!r} in the store; fit one first "
                         f"(gapgauge prior {scenario.path})")
    return PriorFit.from_state(loaded[0], loaded[1] or {}, scenario)


def fit_prior(
    scenario: Scenario | str | Path,
    store: Store | str | Path,
    *,
    seed: int = 0,
    max_inducing: int | None = None,
    progress: Progress | None = None,
) -> PriorFit:
    """Fit the prior of ``scenario`` from ``store`` and store it there.

    The simulation levels of the stored prior are reused when it was fitted on the same sweep rows
    with the same ``seed`` and ``max_inducing`` (the result is then the one a full fit gives).

    Args:
        scenario: a Scenario or the path of its TOML.
        store: an open :class:`~gapgauge.store.Store` (left open) or the path of its file.
        seed: seeds the subsample, the inducing points and the optimiser restarts; stored.
        max_inducing: inducing points of a sparse simulation level (None: 300, or 600 for a sweep of more
            than 10^5 rollouts, :func:`gapgauge.compare.prior.inducing_for`; the sparse GP takes over above
            ``gapgauge.compare.multifidelity.SPARSE_THRESHOLD`` = 500 points).
        progress: called as ``progress(stage, step, 3)`` (see :mod:`gapgauge.progress`).

    Raises:
        ModelError: no sweep for the scenario yet, no rollout that stood, or an argument out of range.
    """
    scenario = as_scenario(scenario)
    with open_store(store, scenario=scenario) as opened:
        stored = _stored(scenario, opened)
        wanted = max_inducing
        if stored is not None and wanted is None:  # the default for the sweep the stored fit was made on
            wanted = inducing_for(max(stored.n_sim, stored.n_sim_fall_model))
        if stored is not None and (stored.seed != seed or stored.max_inducing != wanted):
            stored = None
        fit = _refit(scenario, opened, stored, sweep_state(scenario, opened), seed, max_inducing, progress)
        save_prior(opened, fit)
    return fit


def current_prior(
    scenario: Scenario | str | Path,
    store: Store | str | Path,
    *,
    seed: int = 0,
    progress: Progress | None = None,
) -> PriorFit:
    """The stored prior if it was fitted on the store's current sweep and trials; else a new fit (stored),
    which keeps the stored simulation levels (and their seed) when only the trials changed.

    ``seed`` seeds a fit from scratch (no stored prior, or the sweep changed); that fit takes the default
    inducing points for the sweep's size (:func:`gapgauge.compare.prior.inducing_for`).

    Raises:
        ModelError: as :func:`fit_prior`.
    """
    scenario = as_scenario(scenario)
    with open_store(store, scenario=scenario) as opened:
        stored = _stored(scenario, opened)
        state = sweep_state(scenario, opened)
        if stored is not None and stored.sweep_state == state:
            if stored.hardware_key == read_hardware_data(scenario, opened).hardware_key():
                return stored
        # a sweep that changed gets the default inducing points for its size (inducing_for)
        fit = _refit(scenario, opened, stored, state, seed, None, progress)
        save_prior(opened, fit)
    return fit


__all__ = ["current_prior", "fit_prior", "load_prior", "read_hardware_data", "read_prior_data", "save_prior",
           "sweep_state"]
