"""The transfer report: self-contained, escaped, honest about missing sections, with its JSON summary.

Outside checks: the HTML is parsed with the standard library's ``html.parser`` (what a browser's
tokenizer would see as tags and attributes), every image is decoded by Pillow (through
``matplotlib.image.imread``), and the JSON summary is read back with ``json``.
"""

from __future__ import annotations

import base64
import io
import json
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from matplotlib.image import imread

from gapgauge import load_scenario
from gapgauge.safety import CAUTION
from gapgauge.errors import StoreError
from gapgauge.report.html import write_report
from gapgauge.report.summary import collect, decide
from test_report_support import (
    HOSTILE_FILE,
    HOSTILE_NOTE,
    HOSTILE_ROBOT,
    REPO,
    SHIFT_FEATURES,
    build_store,
)


class Tags(HTMLParser):
    """Every start tag with its attributes, and the page's text."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def parse(text: str) -> Tags:
    parser = Tags()
    parser.feed(text)
    return parser


@pytest.fixture(scope="module")
def scenario():
    return load_scenario(REPO / "scenarios" / "push_recovery.toml")


@pytest.fixture(scope="module")
def full(scenario, tmp_path_factory):
    """A report from a store with a sweep, five trials (hostile strings in them) and every result."""
    folder = tmp_path_factory.mktemp("full")
    store = build_store(scenario, folder / "store.sqlite", hostile=True)
    result = write_report(scenario, store, folder / "report.html", plots_dir=folder / "plots")
    return result, result.path.read_text(encoding="utf-8")


@pytest.fixture(scope="module")
def bare(scenario, tmp_path_factory):
    """A report from a store with a sweep and trials but no analysis results yet."""
    folder = tmp_path_factory.mktemp("bare")
    store = build_store(scenario, folder / "lab.sqlite", kinds=())
    result = write_report(scenario, store, folder / "bare.html")
    return result, result.path.read_text(encoding="utf-8")


def test_report_is_self_contained(full):
    _, text = full
    tags = parse(text).tags
    assert not [t for t, _ in tags if t in ("script", "link", "iframe", "object", "embed")]
    for tag, attrs in tags:
        for name in ("src", "href", "action", "srcset", "poster"):
            value = attrs.get(name) or ""
            assert not value.lower().startswith(("http:", "https:", "//", "file:")), (tag, name, value)
    sources = [attrs["src"] for tag, attrs in tags if tag == "img"]
    assert sources and all(s.startswith("data:image/png;base64,") for s in sources)
    assert "url(" not in text  # no CSS fetches either
    policy = [a for t, a in tags if t == "meta" and a.get("http-equiv") == "Content-Security-Policy"]
    assert policy and "default-src 'none'" in policy[0]["content"]


def test_every_image_decodes_as_png(full):
    _, text = full
    sources = [a["src"] for t, a in parse(text).tags if t == "img"]
    assert len(sources) >= 10  # sweep 4, shift 5, prior 2, proposals, budget, calibration
    for src in sources:
        image = imread(io.BytesIO(base64.b64decode(src.split(",", 1)[1])), format="png")
        assert image.ndim == 3 and image.shape[0] > 50 and image.shape[1] > 50


def test_hostile_robot_id_notes_and_file_name_show_as_text(full):
    _, text = full
    page = parse(text)
    # no tag or handler came from the strings; they are in the page's text exactly as written
    assert not [t for t, _ in page.tags if t == "script"]
    assert not [a for _, a in page.tags if any(k.startswith("on") for k in a)]
    assert not [t for t, _ in page.tags if t == "b"]
    body = "".join(page.text)
    for hostile in (HOSTILE_ROBOT, HOSTILE_NOTE, HOSTILE_FILE):
        assert hostile in body
        assert hostile not in text  # only in escaped form in the source
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text


def test_missing_sections_name_the_command_that_fills_them(bare, scenario):
    result, text = bare
    empty = {s.name: s.fill_command for s in result.sections if not s.filled}
    assert set(empty) == {"shift", "prior", "proposals", "budget", "calibration"}
    body = " ".join("".join(parse(text).text).split())
    for name, verb in (
        ("shift", "shift"),
        ("prior", "prior"),
        ("proposals", "propose"),
        ("budget", "budget"),
        ("calibration", "calibrate"),
    ):
        assert empty[name].startswith(f"gapgauge {verb} ")
        assert "--store" in empty[name] and "lab.sqlite" in empty[name]  # not the default store name
        assert f"Run {empty[name]} to fill this section." in body


def test_json_summary_carries_the_first_screen_and_every_result(full):
    result, _ = full
    assert result.json_path == result.path.with_suffix(".json")
    summary = json.loads(result.json_path.read_text(encoding="utf-8"))
    for key in (
        "tool_version",
        "scenario",
        "store",
        "verdict",
        "level",
        "next_step",
        "reasons",
        "figures",
        "sections",
        "results",
        "trials",
        "provenance",
        "caution",
    ):
        assert key in summary, key
    assert summary["caution"] == CAUTION
    assert summary["figures"]["rho"] == pytest.approx(0.93)
    assert summary["figures"]["rho_interval"] == pytest.approx([0.61, 1.24])
    assert summary["figures"]["budget_p80_with_prior"] == 9
    assert summary["figures"]["budget_p80_cold_start"] == 22
    assert summary["figures"]["trials"] == 5 and summary["figures"]["synthetic_trials"] == 5
    assert summary["figures"]["rollouts"]["total"] == 1500
    assert [f["name"] for f in summary["results"]["shift"]["features"]] == list(SHIFT_FEATURES)
    assert summary["trials"][0]["robot_id"] == HOSTILE_ROBOT  # JSON keeps the string as it is
    assert summary["provenance"]["seeds"] == [7]
    assert all(s["filled"] for s in summary["sections"].values())


def test_first_screen_says_go_with_the_proposals_and_the_budget_when_the_prior_is_healthy(full):
    result, text = full
    decision = result.decision
    assert decision.level == "go"
    assert "Go to hardware with the 5 proposed trials" in decision.next_step
    assert "budget P80 = 9 trials (cold start 22)" in decision.next_step
    body = " ".join("".join(parse(text).text).split())
    assert decision.verdict in body and decision.next_step in body
    assert " ".join(CAUTION.split()) in body


def test_plots_dir_receives_every_figure(full):
    result, text = full
    written = sorted(p.name for p in (result.path.parent / "plots").glob("*.png"))
    assert len(written) == text.count("data:image/png;base64,")
    assert "budget_curve.png" in written and "sweep_coverage.png" in written


@pytest.mark.parametrize(
    ("trials", "kinds", "verdicts", "level", "command_word"),
    [
        (0, (), None, "pending", "propose"),
        (5, (), None, "pending", "shift"),
        (5, ("shift",), ("does_not_carry_over",) * 3 + ("carries_over", "undecided"), "stop", "calibrate"),
        (
            5,
            ("shift", "calibration"),
            ("does_not_carry_over",) * 3 + ("carries_over", "undecided"),
            "stop",
            "push_recovery.calibrated.toml",
        ),
        (5, ("shift",), ("undecided",) * 4 + ("carries_over",), "caution", "propose"),
        (5, ("shift",), None, "pending", "prior"),
        (5, ("shift", "prior"), None, "go", "propose"),
        (5, ("shift", "prior", "proposals"), None, "go", "budget"),
    ],
)
def test_next_step_follows_the_results(scenario, tmp_path, trials, kinds, verdicts, level, command_word):
    store = build_store(scenario, tmp_path / "gapgauge.sqlite", trials=trials, kinds=kinds, verdicts=verdicts)
    decision = decide(collect(scenario, store))
    assert decision.level == level
    assert decision.command is not None and command_word in decision.command
    assert decision.reasons
    if "calibration" in kinds:  # the before/after of the calibration is part of the why
        assert "at the calibrated physics 0 of 5 matched features do not carry over" in decision.reasons


def test_a_weak_rho_is_not_sold_as_go(scenario, tmp_path):
    store = build_store(
        scenario, tmp_path / "gapgauge.sqlite", kinds=("shift", "prior", "proposals", "budget")
    )
    store.save_model(
        "prior",
        scenario.content_hash,
        params={"rho": 0.2, "rho_interval": [-0.3, 0.7], "fit_seconds": 1.0, "loo": {}},
    )
    decision = decide(collect(scenario, store))
    assert decision.level == "caution"
    assert "calibrate" in decision.command
    assert any("rho" in r for r in decision.reasons)


def test_no_sweep_asks_for_the_sweep(scenario, tmp_path):
    store = build_store(scenario, tmp_path / "gapgauge.sqlite", sweep=False, trials=0, kinds=())
    out = write_report(scenario, store, tmp_path / "empty.html")
    assert out.decision.command.startswith("gapgauge sweep ")
    assert not np.any([s.filled for s in out.sections])
    assert "No data for this section yet" in out.path.read_text(encoding="utf-8")


def test_report_refuses_an_output_that_is_not_html(scenario, tmp_path):
    store = build_store(scenario, tmp_path / "gapgauge.sqlite", sweep=False, trials=0, kinds=())
    with pytest.raises(StoreError, match="ending in .html"):
        write_report(scenario, store, tmp_path / "report.pdf")
    assert not Path(tmp_path / "report.json").exists()


def test_main_effects_match_the_analytic_first_order_sobol_indices():
    """y = x0 + 2 x1 on the unit square: S0 = 1/5, S1 = 4/5 (variance shares of independent uniform
    terms; Saltelli et al. 2008, ch. 4); binning into 10 bins keeps 99% of each term's variance."""
    from gapgauge.report.html import _ranked_parameters, main_effects

    x = np.random.default_rng(3).random((20_000, 3))
    effects = main_effects(x, x[:, 0] + 2 * x[:, 1])
    assert effects == pytest.approx([0.2 * 0.99, 0.8 * 0.99, 0.0], abs=0.01)
    # a U-shaped effect that a rank correlation would miss is still ranked first
    assert _ranked_parameters(x, (x[:, 2] - 0.5) ** 2 + 0.1 * x[:, 0], 1) == [2]


def test_a_store_that_never_saw_the_scenario_gets_a_report_that_asks_for_the_sweep(scenario, tmp_path):
    from gapgauge.store import Store

    out = write_report(scenario, Store(tmp_path / "new.sqlite"), tmp_path / "fresh.html")
    assert out.decision.level == "pending" and out.decision.command.startswith("gapgauge sweep ")


def test_report_command_writes_the_report_and_refuses_a_missing_store(scenario, tmp_path):
    from click.testing import CliRunner

    from gapgauge.cli import main

    store_path = tmp_path / "lab.sqlite"
    build_store(scenario, store_path, kinds=("shift",)).close()
    out = tmp_path / "out" / "r.html"
    scenario_arg = str(REPO / "scenarios" / "push_recovery.toml")
    ran = CliRunner().invoke(main, ["report", scenario_arg, "--store", str(store_path), "--out", str(out)])
    assert ran.exit_code == 0, ran.output
    assert out.is_file() and out.with_suffix(".json").is_file()
    assert "gapgauge prior" in ran.output  # the empty sections and what fills them
    missing = CliRunner().invoke(main, ["report", scenario_arg, "--store", str(tmp_path / "none.sqlite")])
    assert missing.exit_code == 2
    assert "store not found" in missing.output


def test_a_joint_shift_asks_for_calibration_even_when_features_pass_one_by_one(scenario, tmp_path):
    """MMD p below the level (Gretton et al. 2012 test as stored by the shift step) outranks the per-feature
    verdicts: the next step is calibration, not hardware."""
    store = build_store(scenario, tmp_path / "gapgauge.sqlite", kinds=("shift", "prior", "proposals", "budget"))
    shift = store.load_model("shift", scenario.content_hash)[0]
    shift["joint"]["mmd_p_value"] = 0.001
    store.save_model("shift", scenario.content_hash, params=shift)
    decision = decide(collect(scenario, store))
    assert decision.level == "caution" and "calibrate" in decision.command
    assert any("MMD, p = 0.001" in r for r in decision.reasons)
