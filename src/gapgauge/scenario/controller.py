"""The scenario's ``[controller]`` table: the built-in servo-and-reaction controller, or a callable of your own.

::

    [controller]
    kind = "callable"                      # "builtin" (the default when the table is absent) | "callable"
    module = "com_feedback.py:controller"  # "file.py:function" or "package.module:function"
    rate_hz = 500.0                        # calls per second: the physics rate divided by a whole number
    observation = ["com_x", "com_vx", "heel_x", "toe_x"]   # trajectory channels or model sensors
    parameters = ["ankle_setpoint", "com_gain"]            # optional: the [[parameters]] handed over
    actuators = ["ankle_servo", "hip_servo"]               # optional: the model actuators it drives

Where ``module`` is looked for, without running any of its code (``importlib.machinery.PathFinder``):

- ``file.py:function``: a Python file, relative to the folder of the scenario file (or absolute);
- ``package.module:function``: ``package/module.py`` (or ``package/module/__init__.py``) in the folder of
  the scenario file if it is there, otherwise on the environment's import path (an installed package).

Finding the file executes nothing; the module's code runs only when a simulation of this scenario
starts (:mod:`gapgauge.sim.controller`), never because a store or a report mentions it.
``observation`` entries are ``name`` (a trajectory channel such as ``com_x``, or a one-value model
sensor) or ``name[i]`` (component ``i`` of a model sensor); the names are checked against the compiled
model when the simulation binds the controller. ``parameters`` defaults to every ``[[parameters]]`` entry
in file order; ``actuators`` to the servo actuators of the actuated joints.

:func:`controller_fingerprint` is what the controller contributes to a sweep's identity: the kind, the
reference, the rate, the three lists and the module file's bytes.
"""

from __future__ import annotations

import importlib.machinery
import json
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from ..errors import ScenarioError
from .reader import TableReader, short_repr
from .types import Parameter, Task

if TYPE_CHECKING:
    from .space import Scenario

CONTROLLER_KINDS = ("builtin", "callable")
#: role of a parameter that only the callable reads (nothing in the model or the open-loop inputs)
CONTROLLER_ROLE = "controller"
_OBSERVATION = re.compile(r"^([A-Za-z_][A-Za-z0-9_.:/-]*)(?:\[(\d+)\])?$")
_IDENTIFIER = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
#: a control period must be a whole number of physics steps to within this fraction of a step
_PERIOD_SLACK = 1e-6


@dataclass(frozen=True)
class ControllerSpec:
    """The validated ``[controller]`` table.

    Attributes:
        kind: ``builtin`` or ``callable``.
        module: the reference as written, ``"file.py:function"`` or ``"package.module:function"``
            (empty for the built-in).
        function: the callable's name inside the module.
        source: the module's file, found without running it (None for the built-in).
        import_name: the dotted name to import from the environment, or None when the file is
            loaded from the scenario's folder (or an explicit path).
        rate_hz: control rate, calls per second (None for the built-in).
        period_steps: physics steps per control period, ``1 / (rate_hz * timestep)`` (0 for the built-in).
        observation: the observation's columns, in order (``name`` or ``name[i]``).
        parameters: names of the ``[[parameters]]`` handed to the callable, in its column order.
        actuators: model actuators the callable drives, in its column order; empty means the servo
            actuators of the actuated joints.
        scenario_path: the scenario file, for messages.
    """

    kind: str = "builtin"
    module: str = ""
    function: str = ""
    source: Path | None = None
    import_name: str | None = None
    rate_hz: float | None = None
    period_steps: int = 0
    observation: tuple[str, ...] = ()
    parameters: tuple[str, ...] = ()
    actuators: tuple[str, ...] = ()
    scenario_path: Path | None = None

    @property
    def is_callable(self) -> bool:
        return self.kind == "callable"

    def observation_columns(self) -> list[tuple[str, int | None]]:
        """``(name, component or None)`` of each observation column."""
        out = []
        for entry in self.observation:
            match = _OBSERVATION.match(entry)
            assert match is not None  # checked on reading
            out.append((match.group(1), None if match.group(2) is None else int(match.group(2))))
        return out


BUILTIN_CONTROLLER = ControllerSpec()


def read_controller(r: TableReader, path: Path, parameters: Sequence[Parameter], task: Task) -> ControllerSpec:
    """Read and check the ``[controller]`` table (``r`` over it; empty means the built-in controller).

    ``path`` is the scenario file whose tables define ``[controller]`` (in an ``extends`` chain, the one
    that names it): a module named by a relative path is looked for in its folder.
    """
    kind = r.get("kind", str, "builtin")
    if kind not in CONTROLLER_KINDS:
        raise r.fail("kind", f"unknown controller kind {kind!r}", f"use one of {', '.join(CONTROLLER_KINDS)}")
    own = [p.name for p in parameters if p.role == CONTROLLER_ROLE]
    if kind == "builtin":
        for key in ("module", "rate_hz", "observation", "parameters", "actuators"):
            if r.has(key):
                raise r.fail(key, "belongs to a controller of your own", 'set kind = "callable" or remove the key')
        if own:
            raise r.fail("kind", f"parameter {own[0]!r} has role {CONTROLLER_ROLE!r}, which only a callable reads",
                         'set kind = "callable" with a module, or give the parameter a built-in role')
        r.finish()
        return BUILTIN_CONTROLLER

    module = r.get("module", str, fix='name the callable, e.g. module = "my_controller.py:controller"')
    source, import_name, function = _find_module(r, Path(path).resolve().parent, module)
    if not r.has("rate_hz"):
        raise r.fail("rate_hz", "is missing", "give the control rate in Hz, e.g. rate_hz = 500.0")
    rate = r.number("rate_hz", positive=True)
    steps = 1.0 / (rate * task.timestep)
    period = round(steps)
    if period < 1 or abs(steps - period) > _PERIOD_SLACK:
        raise r.fail("rate_hz", f"{rate} Hz is not the physics rate ({1 / task.timestep:g} Hz) divided by a whole "
                                f"number (that is {steps:.6g} steps of {task.timestep} s)",
                     f"use e.g. {1 / task.timestep:g}, {1 / (2 * task.timestep):g} or "
                     f"{1 / (5 * task.timestep):g} Hz")
    if period > task.nstep:
        raise r.fail("rate_hz", f"one control period ({period} steps) is longer than the horizon "
                                f"({task.nstep} steps)", "raise the rate")
    observation = tuple(_strings(r, "observation", [], "list the channels or sensors it reads, e.g. "
                                                       'observation = ["com_x", "com_vx"]'))
    for i, entry in enumerate(observation):
        if not _OBSERVATION.match(entry):
            raise r.fail(f"observation[{i}]", f"{entry!r} is not a channel or sensor name",
                         'write "name" or "name[i]" for component i of a model sensor')
    names = [p.name for p in parameters]
    handed = tuple(_strings(r, "parameters", names, "list names from [[parameters]]"))
    for i, name in enumerate(handed):
        if name not in names:
            raise r.fail(f"parameters[{i}]", f"{name!r} is not a [[parameters]] name",
                         f"use names from: {', '.join(names)}")
        if name in handed[:i]:
            raise r.fail(f"parameters[{i}]", f"{name!r} appears twice", "hand each parameter over once")
    for name in own:
        if name not in handed:
            raise r.fail("parameters", f"leaves out {name!r}, whose role {CONTROLLER_ROLE!r} means only the "
                                       "callable reads it", "add it to the list or remove the parameter")
    actuators = tuple(_strings(r, "actuators", [], "list actuator names of the model"))
    for i, name in enumerate(actuators):
        if name in actuators[:i]:
            raise r.fail(f"actuators[{i}]", f"{name!r} appears twice", "name each actuator once")
    r.finish()
    return ControllerSpec(kind=kind, module=module, function=function, source=source, import_name=import_name,
                          rate_hz=rate, period_steps=period, observation=observation, parameters=handed,
                          actuators=actuators, scenario_path=r.path)


def _strings(r: TableReader, key: str, default: list[str], fix: str) -> list[str]:
    values = r.get(key, list, default, fix=fix)
    for i, value in enumerate(values):
        if not isinstance(value, str) or not value:
            raise r.fail(f"{key}[{i}]", f"must be a non-empty string, got {short_repr(value)}", fix)
    return list(values)


def _find_module(r: TableReader, folder: Path, module: str) -> tuple[Path, str | None, str]:
    """``(source file, import name or None, function name)`` of a ``module`` reference, looked for in
    ``folder`` first; runs no code."""
    where, sep, function = module.rpartition(":")
    if not sep or not where or not _IDENTIFIER.match(function):
        raise r.fail("module", f"{module!r} is not a callable reference",
                     'write "file.py:function" or "package.module:function"')
    if where.endswith(".py"):
        path = Path(where) if Path(where).is_absolute() else folder / where
        if not path.is_file():
            raise r.fail("module", f"file {where!r} not found (looked at {path})",
                         "give the path of the Python file relative to the scenario file")
        return path.resolve(), None, function
    parts = where.split(".")
    if not all(_IDENTIFIER.match(p) for p in parts):
        raise r.fail("module", f"{where!r} is neither a .py file nor a dotted module name",
                     'write "file.py:function" or "package.module:function"')
    local = folder.joinpath(*parts)
    for candidate in (local.with_suffix(".py"), local / "__init__.py"):
        if candidate.is_file():
            return candidate.resolve(), None, function
    origin = _environment_source(parts)
    if origin is None:
        raise r.fail("module", f"module {where!r} is neither in the scenario's folder {folder} nor importable "
                               "from this environment", "install it, or put the file beside the scenario")
    return origin, where, function


def _environment_source(parts: list[str]) -> Path | None:
    """Source file of the dotted module ``parts`` on ``sys.path``, found package by package without
    importing any of them (``PathFinder.find_spec`` only looks at the file system)."""
    search: list[str] | None = None
    spec = None
    for i in range(len(parts)):
        spec = importlib.machinery.PathFinder.find_spec(".".join(parts[: i + 1]), search)
        if spec is None:
            return None
        if i < len(parts) - 1:
            if spec.submodule_search_locations is None:
                return None
            search = list(spec.submodule_search_locations)
    if spec is None or not spec.origin or not spec.has_location or not spec.origin.endswith(".py"):
        return None  # a namespace package, an extension module or a built-in: no Python source to key on
    return Path(spec.origin).resolve()


def controller_fingerprint(scenario: Scenario) -> bytes:
    """What the scenario's controller contributes to a sweep's identity, as bytes.

    For the built-in controller, its kind alone (its parameters are in the scenario's parameter table).
    For a callable: the kind, the reference, the rate, the observation, parameter and actuator lists,
    then the module file's bytes, read (not run). Only that one file is keyed: code it imports from
    elsewhere is not, so keep a controller's logic in its own file.

    Raises:
        ScenarioError: the module file can no longer be read, naming ``controller.module``.
    """
    spec = scenario.controller
    head = {"kind": spec.kind}
    if spec.is_callable:
        head.update(module=spec.module, rate_hz=spec.rate_hz, observation=list(spec.observation),
                    parameters=list(spec.parameters), actuators=list(spec.actuators))
    text = json.dumps(head, sort_keys=True).encode()
    if not spec.is_callable:
        return text
    assert spec.source is not None
    try:
        source = spec.source.read_bytes()
    except OSError as exc:
        raise ScenarioError(f"{scenario.path}: key 'controller.module': cannot read {spec.source} ({exc}); "
                            "check the file is still there") from None
    return text + b"\n" + source
