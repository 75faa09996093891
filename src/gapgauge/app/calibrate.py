"""Calibrating the simulator as a job: the scenario's trials from the store, the scenario's simulator,
:func:`gapgauge.compare.calibration.calibrate`, the calibrated overlay written beside the scenario
(and checked to load), the typed result stored."""

from __future__ import annotations

import functools
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ..compare.calibration import CalibrationResult, Simulator
from ..compare.calibration import calibrate as calibrate_arrays
from ..compare.calibration.result import default_overlay_path
from ..errors import ScenarioError, StoreError
from ..progress import Progress
from ..scenario import Scenario, load_scenario
from ..sim.rollout import simulate
from ..store import Store
from .common import as_scenario, open_store


def calibrate(
    scenario: Scenario | str | Path,
    store: Store | str | Path,
    *,
    physics_names: Sequence[str] | None = None,
    overlay_path: str | Path | None = None,
    seed: int = 0,
    json_path: str | Path | None = None,
    simulator: Simulator | None = None,
    progress: Progress | None = None,
    **options: Any,
) -> CalibrationResult:
    """Calibrate the simulator's physics to the trials in ``store`` and write the calibrated overlay.

    Reads the scenario's trials, runs :func:`gapgauge.compare.calibration.calibrate` with the
    scenario's simulator (:func:`gapgauge.sim.rollout.simulate`, which measures features through
    :func:`gapgauge.observe.logger_view` exactly as a hardware log is measured) unless ``simulator``
    is given, writes the overlay (default ``<scenario stem>.calibrated.toml`` beside the scenario),
    checks that :func:`gapgauge.scenario.load_scenario` accepts it, and stores the result (kind
    ``"calibration"``); with ``json_path`` it writes the result JSON there too.

    Args:
        scenario: the base scenario the trials were run under, or its path.
        store: a :class:`gapgauge.store.Store`, or the path of one.
        physics_names: quantities to calibrate (default the scenario's ``[calibration] physics``).
        overlay_path: where to write the overlay (a ``.toml`` file).
        seed: seed of every random choice; stored with the result.
        json_path: also write the result JSON here.
        simulator: ``simulator(params (n x dim), physics (n x K)) -> RolloutBatch``, replacing the
            scenario's (tests, other simulators).
        progress: ``progress(stage, done, total)`` after every simulator call, or None.
        **options: passed on to :func:`gapgauge.compare.calibration.calibrate` (``discrepancy``,
            ``generations``, ...).

    Returns:
        The :class:`~gapgauge.compare.calibration.CalibrationResult`, ``overlay_path`` set.

    Raises:
        StoreError: no store at the path, or no trial of this scenario in it.
        ScenarioError: a bad ``overlay_path``, an overlay that cannot be written or does not load.
    """
    scenario = as_scenario(scenario)
    target = _overlay_target(scenario, overlay_path)  # refuse a bad path before the work, not after
    if simulator is None:
        simulator = functools.partial(simulate, scenario)
    with open_store(store, scenario=scenario) as db:
        params, features, names, trial_ids = _trial_arrays(scenario, db)
        result = calibrate_arrays(
            scenario, params, features, names, simulator, physics_names=physics_names, seed=seed,
            trial_ids=trial_ids, progress=progress, **options,
        )
        result.overlay_path = _write_overlay(scenario, result, target)
        db.save_result(scenario.content_hash, result)
    if json_path is not None:
        result.write_json(json_path)
    return result


def _trial_arrays(scenario: Scenario, store: Store) -> tuple[np.ndarray, np.ndarray, list[str], list[int]]:
    """The scenario's stored trials: params ``(n x dim)`` in scenario units, features ``(n x f)`` in SI
    (NaN where a trial lacks one), the ``f`` feature names, and the trial ids.

    Raises:
        StoreError: the store holds no trial of this scenario.
    """
    trials = store.trials(scenario.content_hash)
    if not trials:
        raise StoreError(
            f"{store.path}: no hardware trials of scenario {scenario.name!r} ({scenario.content_hash}); "
            f"ingest the trials' logs of {scenario.path} into this store first"
        )
    params = np.array([scenario.params_from_mapping(t.params, source=f"trial {t.id}") for t in trials])
    names = [f for f in scenario.features.names if any(f in t.features for t in trials)]
    features = np.array([[float(t.features.get(f, np.nan)) for f in names] for t in trials], dtype=float)
    return params, features, names, [int(t.id) if t.id is not None else -1 for t in trials]


def _overlay_target(scenario: Scenario, overlay_path: str | Path | None) -> Path:
    """``overlay_path``, or the default beside the scenario, once checked to be a new ``.toml`` file name."""
    target = Path(overlay_path) if overlay_path is not None else default_overlay_path(scenario.path)
    if target.suffix.lower() != ".toml":
        raise ScenarioError(f"overlay_path {target}: an overlay is a scenario file; give a path ending in .toml")
    if target.resolve() == Path(scenario.path).resolve():
        raise ScenarioError(f"overlay_path {target}: that is the base scenario itself; give another file name")
    return target


def _write_overlay(scenario: Scenario, result: CalibrationResult, target: Path) -> Path:
    """Write the overlay text at ``target`` and check that it loads."""
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_text(result.overlay_text(target), encoding="utf-8")
    except OSError as exc:
        raise ScenarioError(
            f"overlay_path {target}: cannot write the overlay ({exc.strerror}); check the folder"
        ) from None
    try:
        load_scenario(target)
    except ScenarioError as exc:
        raise ScenarioError(
            f"overlay_path {target}: the written overlay does not load ({exc}); write it inside the scenario's "
            f"project folder {Path(scenario.path).resolve().parent.parent}, e.g. beside the scenario"
        ) from None
    return target
