"""A controller of your own: the scenario's Python callable, called at its control rate over a batch.

The scenario names ``module:function`` (:mod:`gapgauge.scenario.controller`); here it is loaded and run::

    ctrl = controller(t, observation, params)

- ``t``: the time of the call, s (a float: every rollout of a batch shares the clock);
- ``observation``: ``(n x k)``, the scenario's ``[controller].observation`` columns, SI (read-only);
- ``params``: ``(n x d)``, the ``[controller].parameters`` columns, scenario units (read-only);
- ``ctrl``: ``(n x J)``, one column per driven actuator, in that actuator's own units (for the position
  servos of the bundled body: the target angle, rad). MuJoCo holds it for the control period.

Between calls MuJoCo steps the batch in its C threads: one ``mujoco.rollout`` call per control period
(``period_steps`` physics steps), the full-physics state carried from the end of one period to the start
of the next, so the outputs (states and sensor data, ``(n x nstep x ...)``) are filled exactly as one
open-loop call over the whole horizon fills them and everything downstream (divergence, channels,
features) reads them unchanged. The open-loop inputs of the task (the push, the platform drive) stay as
:func:`gapgauge.sim.controls.build_controls` built them; only the driven actuators' columns are the
callable's. The servo gains and the physics draw act through the models as for the built-in controller.

What the callable sees at a call at ``t_j``: the sensor sample the simulation logged last, which is
that of ``t_j - dt`` (``mujoco.rollout`` computes a step's sensors on the state before it integrates;
one physics step of sensing latency, as a logger's latest sample has); the first call, at ``t = 0``,
sees the initial state's sensors (``mj_forward`` with the open-loop inputs of ``t = 0``).

What differs from one open-loop call, and why: MuJoCo's constraint solver starts each step from the
previous step's accelerations (``qacc_warmstart``), which are not part of the state that
``mujoco.rollout`` returns, so each period starts the solver cold. Its answer then differs within the
solver tolerance (``opt.tolerance``): measured on the bundled body, joint angles and centre of mass
agree with a warm-started run to about 1e-14 in most rollouts (the worst of 32 within 1e-6), objectives
to 1e-8 and statuses exactly; the contact forces of a rollout whose contacts chatter drift further.
With ``<flag warmstart="disable"/>`` in the model both are bit-identical (tests/test_controller.py).
A simulation warning that does not reset the state (a full contact buffer) halts an open-loop rollout
at the next step but is cleared by the next period here; the ones that do reset it (bad ``qpos``,
``qvel``, ``qacc``) halt it in both, and a halted rollout is left out of later calls with its last
state repeated, as MuJoCo does.

A callable that raises, returns another shape, or returns NaN or infinity for a rollout that is still
running is a :class:`~gapgauge.errors.ControllerError` naming ``controller.module``; it propagates out
of the simulation before any result is returned, so a sweep writes no part of that chunk.
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.util
import re
import sys
import traceback
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from types import ModuleType

import mujoco
import mujoco.rollout
import numpy as np

from ..errors import ControllerError
from ..scenario import Scenario
from .channels import extract
from .controls import CONTROL_SPEC, STATE_SPEC, _offset, state_offsets
from .model import ModelLayout, _load

#: loaded callables by (source file, sha256 of its bytes, function): an edited file is loaded afresh
_LOADED: dict[tuple[str, str, str], Callable] = {}
#: sha256 of each environment module's file when this process imported it
_IMPORTED: dict[str, str] = {}
#: CPython's GIL switch interval while a closed loop runs, s. The loop takes the GIL back once per
#: control period, after a few hundred microseconds of stepping without it, while the pipeline's other
#: thread measures the previous sub-batch in Python; at the default 5 ms every period could wait up to
#: 5 ms for the GIL, several times its own length: 64 rollouts at 500 Hz beside a busy Python thread took
#: 5.6-7.4 s at 5 ms and 2.0-2.1 s at 0.2 ms (2-core VM; without the busy thread 2.8-3.3 s either way).
SWITCH_INTERVAL = 2e-4


def _fail(scenario: Scenario, key: str, problem: str, fix: str) -> ControllerError:
    return ControllerError(f"{scenario.path}: key 'controller.{key}': {problem}; {fix}")


def _line_in(exc: BaseException, source: object) -> str:
    """`` (file line N)`` of the deepest frame of ``exc``'s traceback inside ``source``, or ""."""
    frames = [f for f in traceback.extract_tb(exc.__traceback__) if f.filename == str(source)]
    return f" ({frames[-1].filename}, line {frames[-1].lineno})" if frames else ""


def load_callable(scenario: Scenario) -> Callable:
    """Import the scenario's controller module and return its callable. This runs the module's code.

    A file found in the scenario's folder (or named by path) is loaded from that file under a private
    module name (so two scenarios' ``controller.py`` never collide, and an edited file is loaded
    afresh); a module of the environment is imported as usual, and reloaded if its file has changed
    since.

    Raises:
        ControllerError: the module does not import, or has no callable of that name.
    """
    spec = scenario.controller
    if not spec.is_callable or spec.source is None:
        raise ValueError(f"scenario {scenario.name!r} has the built-in controller, no callable")
    try:
        digest = hashlib.sha256(spec.source.read_bytes()).hexdigest()
    except OSError as exc:
        raise _fail(scenario, "module", f"cannot read {spec.source} ({exc})", "check the file is there") from None
    key = (str(spec.source), digest, spec.function)
    hit = _LOADED.get(key)
    if hit is not None:
        return hit
    try:
        if spec.import_name is not None:
            module = importlib.import_module(spec.import_name)
            if _IMPORTED.setdefault(spec.import_name, digest) != digest:  # edited since this process imported it
                module = importlib.reload(module)
                _IMPORTED[spec.import_name] = digest
        else:
            module = _load_file(spec.source, digest)
    except (Exception, SystemExit) as exc:
        raise _fail(scenario, "module", f"importing {spec.module!r} failed with {type(exc).__name__}: "
                                        f"{_one_line(exc)}{_line_in(exc, spec.source)}", "fix the module") from exc
    function = getattr(module, spec.function, None)
    if not callable(function):
        raise _fail(scenario, "module", f"{spec.source} defines no callable {spec.function!r}",
                    f"define def {spec.function}(t, observation, params) there, or name another function")
    _LOADED[key] = function
    return function


def _load_file(source: object, digest: str) -> ModuleType:
    stem = re.sub(r"\W", "_", str(getattr(source, "stem", "controller")))
    name = f"_gapgauge_controller_{stem}_{digest[:12]}"
    found = importlib.util.spec_from_file_location(name, str(source))
    assert found is not None and found.loader is not None
    module = importlib.util.module_from_spec(found)
    sys.modules[name] = module  # dataclasses and pickling inside the module look themselves up here
    try:
        found.loader.exec_module(module)
    except BaseException:
        del sys.modules[name]
        raise
    return module


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text if len(text) <= 200 else text[:197] + "..."


@contextmanager
def prompt_gil_handover() -> Iterator[None]:
    """Lower the interpreter's GIL switch interval to :data:`SWITCH_INTERVAL` for the block (never
    raise it), and put back the one found unless someone else changed it meanwhile."""
    before = sys.getswitchinterval()
    if before <= SWITCH_INTERVAL:
        yield
        return
    sys.setswitchinterval(SWITCH_INTERVAL)
    ours = sys.getswitchinterval()
    try:
        yield
    finally:
        if sys.getswitchinterval() == ours:
            sys.setswitchinterval(before)


class ClosedLoop:
    """The scenario's callable bound to its compiled model: columns looked up once, buffers reused.

    Build with :func:`closed_loop`; :meth:`rollout` is called by the simulation pipeline in place of
    one ``mujoco.rollout`` call over the horizon.
    """

    def __init__(self, scenario: Scenario, base: mujoco.MjModel, layout: ModelLayout):
        spec = scenario.controller
        self.scenario = scenario
        self.function = load_callable(scenario)
        self.layout = layout
        self.period = spec.period_steps
        self.dt = scenario.task.timestep
        self.time_column = state_offsets(base)["time"]
        names = scenario.parameter_names
        self.param_columns = np.array([names.index(n) for n in spec.parameters], dtype=int)
        ctrl0 = _offset(base, CONTROL_SPEC, mujoco.mjtState.mjSTATE_CTRL)
        self.actuator_names, ids = self._actuators(base)
        self.ctrl_columns = ctrl0 + ids
        self.channel_names, self.channel_slots, self.sensor_columns, self.sensor_slots = self._observation(base)
        self.k = len(spec.observation)
        self.scratch = mujoco.MjData(base)
        self._buffers: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
        self.nstate = mujoco.mj_stateSize(base, STATE_SPEC)
        self.ncontrol = mujoco.mj_stateSize(base, CONTROL_SPEC)
        self.nsensordata = base.nsensordata

    def _actuators(self, base: mujoco.MjModel) -> tuple[tuple[str, ...], np.ndarray]:
        spec = self.scenario.controller
        if not spec.actuators:
            ids = np.asarray(self.layout.servo_ids, dtype=int)
            return tuple(base.actuator(int(i)).name for i in ids), ids
        ids = []
        for i, name in enumerate(spec.actuators):
            a = mujoco.mj_name2id(base, mujoco.mjtObj.mjOBJ_ACTUATOR, name)
            if a < 0:
                known = ", ".join(base.actuator(j).name for j in range(base.nu))
                raise _fail(self.scenario, f"actuators[{i}]", f"the model has no actuator {name!r}",
                            f"use names from: {known}")
            ids.append(a)
        return tuple(spec.actuators), np.array(ids, dtype=int)

    def _observation(self, base: mujoco.MjModel) -> tuple[list[str], list[int], np.ndarray, list[int]]:
        """Trajectory channels to extract and their column slots; sensordata addresses and their slots."""
        spec = self.scenario.controller
        channels = set(self.scenario.channels)
        channel_names, channel_slots, sensor_columns, sensor_slots = [], [], [], []
        for slot, (name, component) in enumerate(spec.observation_columns()):
            if component is None and name in channels:
                channel_names.append(name)
                channel_slots.append(slot)
                continue
            s = mujoco.mj_name2id(base, mujoco.mjtObj.mjOBJ_SENSOR, name)
            key = f"observation[{slot}]"
            if s < 0:
                raise _fail(self.scenario, key, f"{name!r} is neither a trajectory channel of this scenario nor a "
                                                "sensor of the model",
                            f"use channels ({', '.join(sorted(channels))}) or sensors "
                            f"({', '.join(base.sensor(j).name for j in range(base.nsensor))})")
            dim = int(base.sensor_dim[s])
            if component is None and dim != 1:
                raise _fail(self.scenario, key, f"sensor {name!r} has {dim} components",
                            f'name one, e.g. "{name}[0]"')
            if component is not None and component >= dim:
                raise _fail(self.scenario, key, f"sensor {name!r} has {dim} component(s), no [{component}]",
                            f"use an index from 0 to {dim - 1}")
            sensor_columns.append(int(base.sensor_adr[s]) + (component or 0))
            sensor_slots.append(slot)
        return channel_names, channel_slots, np.array(sensor_columns, dtype=int), sensor_slots

    def observe(self, sd: np.ndarray) -> np.ndarray:
        """Observation ``(n x k)`` from one sensor-data sample per rollout, ``sd (n x nsensordata)``."""
        out = np.empty((sd.shape[0], self.k))
        if self.channel_names:
            with_cop = any(name.startswith("cop_") for name in self.channel_names)
            got = extract(sd[:, None, :], self.layout, names=self.channel_names, with_cop=with_cop, copy=False)
            for name, slot in zip(self.channel_names, self.channel_slots, strict=True):
                out[:, slot] = got[name][:, 0]
        if self.sensor_slots:
            out[:, self.sensor_slots] = sd[:, self.sensor_columns]
        return out

    def first_observation(self, models: list[mujoco.MjModel], x0: np.ndarray, control: np.ndarray) -> np.ndarray:
        """Observation at ``t = 0``: each rollout's initial state through ``mj_forward``, ``(n x k)``."""
        sd = np.empty((len(models), self.nsensordata))
        data = self.scratch
        for i, model in enumerate(models):
            mujoco.mj_setState(model, data, x0[i], STATE_SPEC)
            mujoco.mj_setState(model, data, control[i, 0], CONTROL_SPEC)
            mujoco.mj_forward(model, data)
            sd[i] = data.sensordata
        return self.observe(sd)

    def command(self, t: float, observation: np.ndarray, params: np.ndarray) -> np.ndarray:
        """Call the controller once and check what it returns: ``(n x J)`` finite floats."""
        spec = self.scenario.controller
        n, j = observation.shape[0], len(self.ctrl_columns)
        observation.flags.writeable = False
        params.flags.writeable = False
        when = f"at t = {t:.4f} s on a batch of {n}"
        try:
            got = self.function(t, observation, params)
        except Exception as exc:
            raise _fail(self.scenario, "module", f"{spec.module} raised {type(exc).__name__}: {_one_line(exc)} "
                                                 f"{when}{_line_in(exc, spec.source)}",
                        "fix the controller (it gets t, observation (n x k), params (n x d))") from exc
        try:
            ctrl = np.asarray(got, dtype=float)
        except (TypeError, ValueError):
            raise _fail(self.scenario, "module", f"{spec.module} returned {type(got).__name__}, not an array of "
                                                 f"numbers, {when}", f"return an ({n} x {j}) array") from None
        if ctrl.shape != (n, j):
            raise _fail(self.scenario, "module", f"{spec.module} returned shape {ctrl.shape} {when}",
                        f"return ({n} x {j}): one row per rollout, one column per actuator "
                        f"({', '.join(self.actuator_names)})")
        bad = ~np.isfinite(ctrl).all(axis=1)
        if bad.any():
            i = int(np.argmax(bad))
            shown = ", ".join(f"{name} = {value:.6g}" for name, value in zip(spec.parameters, params[i], strict=True))
            raise _fail(self.scenario, "module", f"{spec.module} returned NaN or infinity for {int(bad.sum())} of {n} "
                                                 f"rollout(s) {when} (the first with {shown or 'no parameters'})",
                        "return finite actuator commands for every rollout")
        return ctrl

    def _buffer(self, n: int, length: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Contiguous control, state and sensor-data buffers of one period for ``n`` rollouts."""
        held = self._buffers.get(length)
        if held is None or held[0].shape[0] < n:
            held = (np.empty((n, length, self.ncontrol)), np.empty((n, length, self.nstate)),
                    np.empty((n, length, self.nsensordata)))
            self._buffers[length] = held
        return held[0][:n], held[1][:n], held[2][:n]

    def rollout(self, runner: mujoco.rollout.Rollout, models: list[mujoco.MjModel], datas: list[mujoco.MjData],
                x0: np.ndarray, control: np.ndarray, params: np.ndarray, *, state: np.ndarray,
                sensordata: np.ndarray) -> None:
        """Roll out a batch in closed loop, filling ``state`` and ``sensordata`` as one open-loop
        ``runner.rollout`` over the horizon would.

        Args:
            runner: the pipeline's ``mujoco.rollout.Rollout`` (its thread pool).
            models: one per rollout (gains and physics set). datas: one ``MjData`` per thread.
            x0: initial full-physics states, ``(n x nstate)``.
            control: open-loop inputs, ``(n x nstep x ncontrol)`` under ``CONTROL_SPEC``; the driven
                actuators' columns are replaced by the callable's commands (read, not written).
            params: the scenario's parameters, ``(n x dim)``, scenario units and order.
            state, sensordata: outputs, ``(n x nstep x nstate)`` and ``(n x nstep x nsensordata)``.
        """
        with prompt_gil_handover():
            self._rollout(runner, models, datas, x0, control, params, state, sensordata)

    def _rollout(self, runner: mujoco.rollout.Rollout, models: list[mujoco.MjModel], datas: list[mujoco.MjData],
                 x0: np.ndarray, control: np.ndarray, params: np.ndarray, state: np.ndarray,
                 sensordata: np.ndarray) -> None:
        n, nstep = control.shape[:2]
        handed = np.ascontiguousarray(params[:, self.param_columns])
        handed.flags.writeable = False
        observation = self.first_observation(models, x0, control)
        live = np.arange(n)
        live_models = list(models)
        x = np.ascontiguousarray(x0)
        for first in range(0, nstep, self.period):
            last = min(first + self.period, nstep)
            m = len(live)
            if m == 0:
                break
            everyone = m == n
            ctrl = self.command(first * self.dt, observation, handed if everyone else handed[live])
            c, s, d = self._buffer(m, last - first)
            c[:] = control[:, first:last] if everyone else control[live, first:last]
            c[:, :, self.ctrl_columns] = ctrl[:, None, :]
            runner.rollout(live_models, datas, x, c, control_spec=CONTROL_SPEC, skip_checks=True,
                           nstep=last - first, state=s, sensordata=d)
            if everyone:
                state[:, first:last] = s
                sensordata[:, first:last] = d
            else:
                state[live, first:last] = s
                sensordata[live, first:last] = d
            x = np.ascontiguousarray(s[:, -1])
            observation = self.observe(d[:, -1])
            # A rollout MuJoCo halted (a warning that reset its clock) or that holds non-finite values
            # is left out of later calls, its last state repeated to the horizon as MuJoCo would.
            halted = ~(np.abs(x[:, self.time_column] - last * self.dt) < 0.5 * self.dt)
            halted |= ~np.isfinite(x).all(axis=1) | ~np.isfinite(observation).all(axis=1)
            if halted.any():
                gone = live[halted]
                state[gone, last:] = state[gone, last - 1:last]
                sensordata[gone, last:] = sensordata[gone, last - 1:last]
                keep = np.flatnonzero(~halted)
                live = live[keep]
                live_models = [live_models[i] for i in keep]
                x = np.ascontiguousarray(x[keep])
                observation = observation[keep]


def closed_loop(scenario: Scenario, base: mujoco.MjModel, layout: ModelLayout) -> ClosedLoop | None:
    """The scenario's callable controller bound to its model (loading the module runs its code), or
    None for the built-in controller, whose inputs are all open loop."""
    if not scenario.controller.is_callable:
        return None
    return ClosedLoop(scenario, base, layout)


def check_controller(scenario: Scenario) -> None:
    """Load and bind the scenario's callable controller (this runs its module's code), so a module that
    does not import, a missing function, or an observation or actuator the model lacks is one
    :class:`~gapgauge.errors.ControllerError` line before any work; nothing for the built-in controller."""
    if scenario.controller.is_callable:
        ClosedLoop(scenario, *_load(scenario))
