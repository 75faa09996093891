"""Glue between the stages: wires the simulator into the ``compare/`` functions that take one.

``compare/`` never imports ``sim/`` to run physics (DEVELOPERS.md, "Rules of the house"); the functions
here make the default wiring, read what the store holds and write what the command line promises.
"""

from __future__ import annotations

import functools
import json
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from .errors import ModelError, ScenarioError, StoreError
from .records import RolloutBatch
from .scenario import Scenario, load_scenario

if TYPE_CHECKING:  # pragma: no cover - without importing the heavy modules at run time
    from .compare.calibration import CalibrationResult


def scenario_simulator(scenario: Scenario) -> Callable[[np.ndarray, np.ndarray], RolloutBatch]:
    """``simulator(params (n x dim), physics (n x k)) -> RolloutBatch`` for ``scenario``.

    :func:`gapgauge.sim.rollout.simulate` measures features through
    :func:`gapgauge.observe.logger_view`, exactly as a hardware log is measured, so simulated and
    hardware features are comparable.
    """
    from .sim.rollout import simulate

    return functools.partial(simulate, scenario)


def trial_arrays(scenario: Scenario, store: Any) -> tuple[np.ndarray, np.ndarray, list[str], list[int]]:
    """The scenario's stored trials as arrays.

    Returns:
        params ``(n x dim)`` in scenario units, features ``(n x f)`` in SI (NaN where a trial lacks
        one), the ``f`` feature names, and the trial ids.

    Raises:
        StoreError: the store holds no trial of this scenario.
    """
    trials = store.trials(scenario.content_hash)
    if not trials:
        raise StoreError(
            f"{getattr(store, 'path', 'store')}: no hardware trials of scenario {scenario.name!r} "
            f"({scenario.content_hash}); take them in first with `gapgauge ingest {scenario.path} LOGS...`"
        )
    params = np.array([scenario.params_from_mapping(t.params, source=f"trial {t.id}") for t in trials])
    names = [f for f in scenario.features.names if any(f in t.features for t in trials)]
    features = np.array([[float(t.features.get(f, np.nan)) for f in names] for t in trials], dtype=float)
    return params, features, names, [int(t.id) if t.id is not None else -1 for t in trials]


def calibrate_from_store(
    scenario: Scenario,
    store: Any,
    *,
    physics_names: Sequence[str] | None = None,
    overlay_path: str | Path | None = None,
    seed: int = 0,
    json_path: str | Path | None = None,
    progress: bool = True,
    simulator: Callable[[np.ndarray, np.ndarray], RolloutBatch] | None = None,
    **options: Any,
) -> CalibrationResult:
    """Calibrate the simulator's physics to the trials in ``store`` and write the calibrated overlay.

    Reads the scenario's trials, runs :func:`gapgauge.compare.calibration.calibrate` with the
    scenario's simulator (:func:`scenario_simulator`, unless ``simulator`` is
    given), writes the overlay (default ``<scenario stem>.calibrated.toml`` beside the scenario) and
    checks that :func:`gapgauge.scenario.load_scenario` accepts it, stores the result JSON as model kind
    ``"calibration"`` and, with ``json_path``, writes it there too.

    Args:
        scenario: the base scenario the trials were run under.
        store: a :class:`gapgauge.store.Store`.
        physics_names: quantities to calibrate (default the scenario's ``[calibration] physics``).
        overlay_path: where to write the overlay.
        seed: seed of every random choice; stored with the result.
        json_path: also write the result JSON here.
        progress: show a progress bar on stderr.
        simulator: replaces the default wiring (tests, other simulators).
        **options: passed on to ``calibrate`` (``discrepancy``, ``generations``, ...).

    Returns:
        The :class:`~gapgauge.compare.calibration.CalibrationResult`, ``overlay_path`` set.
    """
    from .compare.calibration import calibrate

    params, features, names, trial_ids = trial_arrays(scenario, store)
    if simulator is None:
        simulator = scenario_simulator(scenario)
    result = calibrate(
        scenario, params, features, names, simulator, physics_names=physics_names, seed=seed,
        progress=progress, **options,
    )
    target = Path(overlay_path) if overlay_path is not None else result.default_overlay_path()
    if target.suffix.lower() != ".toml":
        raise ScenarioError(f"--overlay {target}: an overlay is a scenario file; give a path ending in .toml")
    if target.resolve() == Path(scenario.path).resolve():
        raise ScenarioError(f"--overlay {target}: that is the base scenario itself; give another file name")
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_text(result.overlay_text(target), encoding="utf-8")
    except OSError as exc:
        raise ScenarioError(
            f"--overlay {target}: cannot write the overlay ({exc.strerror}); check the folder"
        ) from None
    try:
        load_scenario(target)
    except ScenarioError as exc:
        raise ScenarioError(
            f"--overlay {target}: the written overlay does not load ({exc}); write it inside the scenario's "
            f"project folder {Path(scenario.path).resolve().parent.parent}, e.g. beside the scenario"
        ) from None
    result.overlay_path = target
    data = result.to_json()
    data["trial_ids"] = trial_ids
    try:
        store.save_model("calibration", scenario.content_hash, params=data)
    except Exception as exc:  # a store that cannot take it is a user-facing store problem
        if isinstance(exc, StoreError):
            raise
        raise ModelError(f"cannot store the calibration result ({exc}); check the store") from None
    if json_path is not None:
        try:
            Path(json_path).write_text(json.dumps(data, indent=2, allow_nan=False) + "\n", encoding="utf-8")
        except OSError as exc:
            raise ModelError(f"--json {json_path}: cannot write ({exc.strerror}); check the folder") from None
    return result
