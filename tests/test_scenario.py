"""Scenario loading: the bundled files load, and bad files are refused with the key path and a fix."""

from __future__ import annotations

import math
import os
import re
import shutil
from pathlib import Path

import numpy as np
import pytest

from gapgauge import ScenarioError, load_scenario
from gapgauge.scenario.model_info import joint_ranges

ROOT = Path(__file__).resolve().parents[1]
PUSH = ROOT / "scenarios" / "push_recovery.toml"


@pytest.fixture()
def project(tmp_path: Path) -> Path:
    """A scratch project folder laid out like the repository: models/ and scenarios/."""
    (tmp_path / "models").mkdir()
    (tmp_path / "scenarios").mkdir()
    shutil.copy(ROOT / "models" / "planar_body.xml", tmp_path / "models")
    shutil.copy(PUSH, tmp_path / "scenarios" / "push_recovery.toml")
    return tmp_path


def _variant(project: Path, old: str, new: str, name: str = "variant.toml") -> Path:
    text = (project / "scenarios" / "push_recovery.toml").read_text()
    assert old in text, f"test set-up: {old!r} not in the scenario"
    path = project / "scenarios" / name
    path.write_text(text.replace(old, new, 1))
    return path


@pytest.mark.parametrize("name", ["push_recovery.toml", "platform_shift.toml"])
def test_bundled_scenarios_load_with_10_to_14_parameters(name: str) -> None:
    scenario = load_scenario(ROOT / "scenarios" / name)
    assert 10 <= scenario.dim <= 14
    for p in scenario.parameters:
        assert p.low <= p.safe_low < p.safe_high <= p.high
        assert p.unit


def test_api_parameters_carry_name_unit_bounds_and_safe_bounds() -> None:
    first = load_scenario(PUSH).parameters[0]
    for attr in ("name", "unit", "low", "high", "safe_low", "safe_high"):
        assert hasattr(first, attr)


def test_unit_cube_map_round_trips_and_uses_log_axes() -> None:
    scenario = load_scenario(PUSH)
    rng = np.random.default_rng(0)
    u = rng.random((50, scenario.dim))
    assert np.allclose(scenario.to_unit(scenario.from_unit(u)), u, atol=1e-12)
    # a log axis maps its geometric midpoint to 0.5 (definition of a log scale)
    i = next(i for i, p in enumerate(scenario.parameters) if p.log)
    p = scenario.parameters[i]
    mid = np.full(scenario.dim, 0.5)
    assert scenario.from_unit(mid)[0, i] == pytest.approx(math.sqrt(p.low * p.high))


def test_content_hash_changes_with_content(project: Path) -> None:
    base = load_scenario(project / "scenarios" / "push_recovery.toml")
    other = load_scenario(_variant(project, "magnitude = 65.0", "magnitude = 60.0"))
    assert base.content_hash != other.content_hash


@pytest.mark.parametrize(
    ("old", "new", "key"),
    [
        ('name = "push_recovery"', 'name = "push_recovery"\ncolour = "red"', "colour"),
        ("low = 450.0\nhigh = 3000.0", "low = 3000.0\nhigh = 450.0", "parameters[0].high"),
        ("safe_low = 600.0", "safe_low = 50.0", "parameters[0].safe_low"),
        ('kind = "push"', 'kind = "kick"', "task.kind"),
        ("horizon = 3.0", 'horizon = "long"', "task.horizon"),
        ('role = "stiffness"', 'role = "stiffness"\njoint_typo = 1', "parameters[0].joint_typo"),
        (
            '[physics.friction]\nunit = "1"\nlow = 0.5',
            '[physics.friction]\nunit = "1"\nlow = -0.5',
            "physics.friction.low",
        ),
        (
            'ankle_angle = { column = "ankle_pos_deg", unit = "deg" }',
            'ankle_angle = { column = "ankle_pos_deg", unit = "mm" }',
            "hardware.columns.ankle_angle.unit",
        ),
        ("peak_com_excursion = 10.0", "peak_com_excursiom = 10.0", "objective.weights.peak_com_excursiom"),
    ],
)
def test_bad_scenario_is_refused_with_its_key_path(project: Path, old: str, new: str, key: str) -> None:
    path = _variant(project, old, new)
    with pytest.raises(ScenarioError) as info:
        load_scenario(path)
    message = str(info.value)
    assert str(path) in message
    assert f"'{key}'" in message
    assert "\n" not in message
    assert ";" in message  # the fix follows the problem


def test_missing_model_file_is_refused(project: Path) -> None:
    path = _variant(project, "../models/planar_body.xml", "../models/nowhere.xml")
    with pytest.raises(ScenarioError, match=r"key 'model'.*not found"):
        load_scenario(path)


def test_model_relative_to_the_scenario_file_may_lie_outside_the_project(project: Path, tmp_path_factory) -> None:
    elsewhere = tmp_path_factory.mktemp("lab_robot") / "robot.xml"
    shutil.copy(project / "models" / "planar_body.xml", elsewhere)
    relative = os.path.relpath(elsewhere, project / "scenarios")
    assert relative.startswith("../..")  # it leaves the project folder
    scenario = load_scenario(_variant(project, "../models/planar_body.xml", relative))
    assert scenario.model_path == elsewhere.resolve()
    # the same model bytes at another place: the same simulation, so the same sweep key
    assert scenario.simulation_hash == load_scenario(project / "scenarios" / "push_recovery.toml").simulation_hash


def test_absolute_model_path_loads(project: Path, tmp_path_factory) -> None:
    elsewhere = tmp_path_factory.mktemp("abs_robot") / "robot.xml"
    shutil.copy(project / "models" / "planar_body.xml", elsewhere)
    scenario = load_scenario(_variant(project, "../models/planar_body.xml", str(elsewhere)))
    assert scenario.model_path == elsewhere.resolve()


def test_model_that_is_not_mjcf_is_refused(project: Path) -> None:
    (project / "models" / "junk.xml").write_text("<html><body>not a model</body></html>")
    path = _variant(project, "../models/planar_body.xml", "../models/junk.xml")
    with pytest.raises(ScenarioError, match=r"no <mujoco> element"):
        load_scenario(path)


def test_invalid_toml_names_the_file(project: Path) -> None:
    path = project / "scenarios" / "broken.toml"
    path.write_text("name = \n")
    with pytest.raises(ScenarioError, match=re.escape(str(path)) + r": not valid TOML"):
        load_scenario(path)


def test_huge_scenario_file_is_refused_before_parsing(project: Path) -> None:
    path = project / "scenarios" / "huge.toml"
    path.write_text("x = [" + "1," * 600_000 + "1]\n")
    with pytest.raises(ScenarioError, match=r"more than a scenario can be"):
        load_scenario(path)


def test_overlay_extends_base_and_overrides_physics(project: Path) -> None:
    overlay = project / "scenarios" / "push_recovery.calibrated.toml"
    overlay.write_text('extends = "push_recovery.toml"\n\n[physics.friction]\nlow = 0.55\nhigh = 0.65\nnominal = 0.6\n')
    scenario = load_scenario(overlay)
    assert scenario.physics_range("friction").nominal == 0.6
    assert scenario.name == "push_recovery"
    assert scenario.model_path == (project / "models" / "planar_body.xml").resolve()


def test_overlay_may_extend_a_base_elsewhere_whose_model_is_relative_to_the_base(
    project: Path, tmp_path_factory
) -> None:
    elsewhere = tmp_path_factory.mktemp("elsewhere")
    (elsewhere / "scenarios").mkdir()
    (elsewhere / "models").mkdir()
    shutil.copy(PUSH, elsewhere / "scenarios" / "base.toml")
    shutil.copy(project / "models" / "planar_body.xml", elsewhere / "models")
    overlay = project / "scenarios" / "overlay.toml"
    overlay.write_text(f'extends = "{elsewhere / "scenarios" / "base.toml"}"\n')
    assert load_scenario(overlay).model_path == (elsewhere / "models" / "planar_body.xml").resolve()
    overlay.write_text('extends = "missing.toml"\n')
    with pytest.raises(ScenarioError, match=r"key 'extends'.*not found"):
        load_scenario(overlay)


def test_params_from_mapping_refuses_out_of_bounds_and_unknown_names() -> None:
    scenario = load_scenario(PUSH)
    values = {p.name: p.nominal for p in scenario.parameters}
    assert np.allclose(scenario.params_from_mapping(values), scenario.nominal_parameters())
    with pytest.raises(ScenarioError, match="outside its bounds"):
        scenario.params_from_mapping({**values, "ankle_kp": 1e6})
    with pytest.raises(ScenarioError, match="unknown parameter"):
        scenario.params_from_mapping({**values, "elbow_kp": 1.0})
    missing = dict(values)
    missing.pop("hip_kd")
    with pytest.raises(ScenarioError, match="missing parameter"):
        scenario.params_from_mapping(missing)


def test_model_includes_resolve_as_mujoco_does_and_enter_the_simulation_hash(project: Path, tmp_path_factory) -> None:
    # MJCF <include file>: relative to the main model file's folder (MuJoCo XML reference, include/file),
    # wherever that leads on disk.
    shared = tmp_path_factory.mktemp("shared_parts")
    (shared / "options.xml").write_text('<mujoco><option timestep="0.002"/></mujoco>\n')
    text = (project / "models" / "planar_body.xml").read_text()
    relative = os.path.relpath(shared / "options.xml", project / "models")
    included = text.replace("<default>", f'<include file="{relative}"/>\n  <default>', 1)
    (project / "models" / "split.xml").write_text(included)
    path = _variant(project, "../models/planar_body.xml", "../models/split.xml")
    first = load_scenario(path)
    assert (shared / "options.xml").resolve() in first.model_files
    (shared / "options.xml").write_text('<mujoco><option timestep="0.002" impratio="2"/></mujoco>\n')
    assert load_scenario(path).simulation_hash != first.simulation_hash  # an edited include is a new simulation
    (shared / "options.xml").unlink()
    with pytest.raises(ScenarioError, match=r"key 'model'.*MuJoCo cannot compile") as info:
        load_scenario(path)
    assert "\n" not in str(info.value)


def test_model_that_is_not_well_formed_xml_is_refused(project: Path) -> None:
    (project / "models" / "cut.xml").write_text((project / "models" / "planar_body.xml").read_text()[:3000])
    path = _variant(project, "../models/planar_body.xml", "../models/cut.xml")
    with pytest.raises(ScenarioError, match=r"not well-formed XML"):
        load_scenario(path)


def _model_variant(project: Path, edits: dict[str, str]) -> Path:
    """A copy of the bundled model with text ``edits`` (old -> new), and a scenario naming it."""
    text = (project / "models" / "planar_body.xml").read_text()
    for old, new in edits.items():
        assert old in text, f"test set-up: {old!r} not in the model"
        text = text.replace(old, new, 1)
    (project / "models" / "variant.xml").write_text(text)
    return _variant(project, "../models/planar_body.xml", "../models/variant.xml")


def test_joint_ranges_in_degrees_compile_to_radians(project: Path) -> None:
    # MJCF convention (MuJoCo docs, XML reference, compiler/angle): with angle="degree" a hinge's range
    # is read in degrees and the compiled model holds radians, range * pi / 180.
    degrees = {"ankle": (-40.0, 40.0), "knee": (-115.0, 3.0), "hip": (-35.0, 115.0)}
    path = _model_variant(project, {
        '<compiler angle="radian"': '<compiler angle="degree"',
        'range="-0.7 0.7"': 'range="-40 40"',
        'range="-2.0 0.05"': 'range="-115 3"',
        'range="-0.6 2.0"': 'range="-35 115"',
    })
    ranges = joint_ranges(load_scenario(path))
    for name, (low, high) in degrees.items():
        assert ranges[name] == pytest.approx((low * math.pi / 180.0, high * math.pi / 180.0), rel=1e-12)


def test_joint_declared_unlimited_has_no_range(project: Path) -> None:
    # MJCF: limited="false" switches a joint's range off even when the range attribute is given
    # (MuJoCo docs, XML reference, joint/limited); root_pitch has no range at all under autolimits.
    path = _model_variant(project, {'range="-0.6 2.0"': 'range="-0.6 2.0" limited="false"'})
    ranges = joint_ranges(load_scenario(path))
    assert "hip" not in ranges
    assert "root_pitch" not in ranges
    assert ranges["ankle"] == pytest.approx((-0.7, 0.7))  # the range written in the bundled model, in rad
