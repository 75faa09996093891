"""The demo: bundled files found relative to the package, copied so that everything lives in one folder,
and (when the whole pipeline is installed) the quick path end to end producing the report."""

from __future__ import annotations

import json

import pytest

from gapgauge import load_scenario
from gapgauge.app import demo
from gapgauge.errors import ScenarioError
from gapgauge.sim.standin import load_profile


def test_bundled_files_are_found_beside_the_package():
    files = demo.bundled_files()
    assert files["scenario"].name == "push_recovery.toml"
    assert files["model"].suffix == ".xml"
    scenario = load_scenario(files["scenario"])
    row = load_profile(files["profile"], scenario).physics_row(scenario)  # the profile that shows a gap
    nominal = [r.nominal for r in scenario.physics]
    changed = {r.name for r, a, b in zip(scenario.physics, row, nominal, strict=True) if a != b}
    assert {"friction", "trunk_mass_scale"} <= changed


def test_copied_scenario_loads_from_the_demo_folder_with_its_own_model(tmp_path):
    copies = demo.copy_bundle(tmp_path / "demo")
    scenario = load_scenario(copies["scenario"])
    assert scenario.model_path == copies["model"].resolve()
    assert scenario.content_hash == load_scenario(demo.bundled_files()["scenario"]).content_hash


def test_missing_bundle_is_a_clear_error(tmp_path, monkeypatch):
    monkeypatch.setattr(demo, "repo_root", lambda: tmp_path)
    with pytest.raises(ScenarioError, match="source checkout"):
        demo.bundled_files()


@pytest.mark.slow
def test_quick_demo_runs_the_whole_path_and_writes_the_report(tmp_path):
    seen = []
    result = demo.run_demo(tmp_path / "demo", quick=True, seed=0, on_step=lambda step: seen.append(step.done))
    assert [step.done for step in result.steps] == [True] * 10
    assert seen == [False, True] * 10  # every step announced, then reported with its figures
    assert result.report_path is not None and result.report_path.is_file()
    summary = json.loads(result.json_path.read_text(encoding="utf-8"))
    assert all(section["filled"] for section in summary["sections"].values()), summary["sections"]
    assert summary["figures"]["trials"] == demo.FIRST_TRIALS == summary["figures"]["synthetic_trials"]
    assert (tmp_path / "demo" / "scenarios" / "push_recovery.calibrated.toml").is_file()
