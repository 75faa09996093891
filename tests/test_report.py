"""The transfer report: self-contained, escaped, honest about missing sections, with its JSON summary,
rendered from the result objects the real jobs produce (see test_report_support.py).

Outside checks: the HTML is parsed with the standard library's ``html.parser`` (what a browser's
tokenizer would see as tags and attributes), every image is decoded by Pillow (through
``matplotlib.image.imread``), and the JSON summary is read back with ``json``. The first screen's
rules are the ones written in :func:`gapgauge.report.sections.decision.decide`'s docstring; those
tests hand it the real results with the one thing the rule looks at set (a verdict, an interval).
"""

from __future__ import annotations

import base64
import io
import itertools
import json
import re
from dataclasses import replace
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from matplotlib.image import imread

from gapgauge.app.report import read_inputs, write_report
from gapgauge.cli import main
from gapgauge.compare.budget import BudgetPlan
from gapgauge.compare.shift import ShiftReport
from gapgauge.compare.stop import StopRule
from gapgauge.errors import StoreError
from gapgauge.quantities import format_number
from gapgauge.report.inputs import ReportInputs
from gapgauge.report.sections.calibration import finding
from gapgauge.report.sections.decision import decide
from gapgauge.report.sections.sweep import main_effects, ranked_parameters
from gapgauge.safety import CAUTION
from gapgauge.store import Store
from test_report_support import (
    HOSTILE_FILE,
    HOSTILE_NOTE,
    HOSTILE_ROBOT,
    SWEEP_ROLLOUTS,
    SWEEP_SEED,
    TRIALS,
    build_store,
    project,
    run_jobs,
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


def page_text(text: str) -> str:
    return " ".join("".join(parse(text).text).split())


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    """A store with a sweep, five stand-in trials (hostile strings in the first) and every job's result;
    yields (scenario, store, the results the jobs returned by kind)."""
    folder = tmp_path_factory.mktemp("lab")
    scenario = project(folder)
    store = build_store(scenario, folder / "store.sqlite", hostile=True, kinds=())
    results = run_jobs(scenario, store)
    yield scenario, store, results
    store.close()


@pytest.fixture(scope="module")
def full(lab, tmp_path_factory):
    scenario, store, _ = lab
    folder = tmp_path_factory.mktemp("full")
    result = write_report(scenario, store, folder / "report.html", plots_dir=folder / "plots")
    return result, result.path.read_text(encoding="utf-8")


@pytest.fixture(scope="module")
def bare(tmp_path_factory):
    """A report from a store (not under the default name) with a sweep and trials but no results yet."""
    folder = tmp_path_factory.mktemp("bare")
    scenario = project(folder)
    with build_store(scenario, folder / "lab.sqlite", kinds=()) as store:
        result = write_report(scenario, store, folder / "bare.html")
    return result, result.path.read_text(encoding="utf-8")


@pytest.fixture(scope="module")
def inputs(lab) -> ReportInputs:
    scenario, store, _ = lab
    return read_inputs(scenario, store)


# ---- the page -------------------------------------------------------------------------------


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


def test_every_image_decodes_as_png(full, lab):
    _, text = full
    shift = lab[2]["shift"]
    sources = [a["src"] for t, a in parse(text).tags if t == "img"]
    # one per shift feature, plus the sweep's, prior's, proposals', budget's and calibration's own
    assert len(sources) >= len(shift.features) + 5
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


def test_missing_sections_name_the_command_that_fills_them(bare):
    result, text = bare
    empty = {s.name: s.fill_command for s in result.sections if not s.filled}
    assert set(empty) == {"shift", "prior", "proposals", "budget", "calibration"}
    body = page_text(text)
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


def test_first_screen_shows_the_verdict_the_next_step_and_the_caution(full):
    result, text = full
    body = page_text(text)
    assert result.decision.verdict in body and result.decision.next_step in body
    assert " ".join(CAUTION.split()) in body


def test_plots_dir_receives_every_figure(full, lab):
    result, text = full
    written = sorted(p.name for p in (result.path.parent / "plots").glob("*.png"))
    assert len(written) == text.count("data:image/png;base64,")
    features = [f.name for f in lab[2]["shift"].features]
    expected = {"sweep_coverage", "budget_curve", "proposals", "calibration", "prior_loo", "prior_vs_hardware"}
    assert expected | {f"shift_{name}" for name in features} <= {Path(name).stem for name in written}


# ---- the JSON summary -----------------------------------------------------------------------


def test_json_summary_carries_the_first_screen_and_every_result_as_the_jobs_returned_it(full, lab):
    result, _ = full
    scenario, _, returned = lab
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
    assert summary["verdict"] == result.decision.verdict
    for kind, job_result in returned.items():  # the stored result, read back, is what the job returned
        assert summary["results"][kind] == json.loads(job_result.to_json()), kind
    prior, budget = returned["prior"], returned["budget"]
    assert summary["figures"]["rho"] == pytest.approx(prior.rho)
    assert summary["figures"]["rho_interval"] == pytest.approx(list(prior.rho_interval))
    assert summary["figures"]["budget_p80_with_prior"] == budget.with_prior.p80
    assert summary["figures"]["budget_p80_cold_start"] == budget.cold_start.p80
    assert summary["figures"]["proposals"] == len(returned["proposals"].proposals)
    # the stand-in robot labels every log it writes synthetic (DESIGN.md section 6)
    assert summary["figures"]["trials"] == TRIALS == summary["figures"]["synthetic_trials"]
    assert summary["figures"]["rollouts"]["total"] == SWEEP_ROLLOUTS
    assert [f["name"] for f in summary["results"]["shift"]["features"]] == list(scenario.features.names)
    assert summary["trials"][0]["robot_id"] == HOSTILE_ROBOT  # JSON keeps the string as it is
    assert SWEEP_SEED in summary["provenance"]["seeds"]
    assert all(s["filled"] for s in summary["sections"].values())


def test_stored_shift_read_back_from_the_summary_is_the_jobs_result(full, lab):
    result, _ = full
    summary = json.loads(result.json_path.read_text(encoding="utf-8"))
    again = ShiftReport.from_dict(summary["results"]["shift"])
    shift = lab[2]["shift"]
    assert [(f.name, f.verdict) for f in again.features] == [(f.name, f.verdict) for f in shift.features]


def test_the_report_is_handed_typed_results_and_the_prior_with_its_models(inputs, lab):
    returned = lab[2]
    for kind, job_result in returned.items():
        assert type(getattr(inputs, kind)) is type(job_result), kind
    assert inputs.prior.objective_model is not None  # restored without refitting, for the prior's plots
    X = np.array([[t.params[n] for n in inputs.scenario.parameter_names] for t in inputs.trials])
    np.testing.assert_allclose(inputs.prior.predict(X)[0], returned["prior"].predict(X)[0], rtol=1e-9)


# ---- the first screen's rules ---------------------------------------------------------------


def with_verdicts(shift: ShiftReport, verdicts: tuple[str, ...], mmd_p_value: float = 0.5) -> ShiftReport:
    """The real shift with ``verdicts`` cycled over its features and the joint MMD p-value set."""
    features = [replace(f, verdict=v) for f, v in zip(shift.features, itertools.cycle(verdicts), strict=False)]
    return replace(shift, features=features, joint=replace(shift.joint, mmd_p_value=mmd_p_value))


def healthy(prior):
    """The real prior with a link interval above 0 and a leave-one-out error below hardware alone."""
    loo = {
        **prior.loo,
        "multi_fidelity": {"rmse": 0.1, "log_predictive_density": 0.4},
        "hardware_only": {"rmse": 0.3, "log_predictive_density": -0.6},
    }
    return replace(prior, rho=0.93, rho_interval=(0.6, 1.25), loo=loo)


BAD = ("does_not_carry_over",) * 3 + ("carries_over", "undecided")  # 6 of 8 decided features do not carry
UNDECIDED = ("undecided",) * 4 + ("carries_over",)
CARRY = ("carries_over",)
NONE = {"shift": None, "prior": None, "proposals": None, "budget": None, "calibration": None}


@pytest.mark.parametrize(
    ("case", "level", "command_word"),
    [
        ({"rollouts": None}, "pending", "sweep"),
        ({"trials": [], **NONE}, "pending", "propose"),
        (NONE, "pending", "shift"),
        ({**NONE, "shift": BAD}, "stop", "calibrate"),
        ({**NONE, "shift": BAD, "calibration": "real"}, "stop", "push_recovery.calibrated.toml"),
        ({**NONE, "shift": UNDECIDED}, "caution", "propose"),
        ({**NONE, "shift": CARRY}, "pending", "prior"),
        ({**NONE, "shift": CARRY, "prior": "healthy"}, "go", "propose"),
        ({**NONE, "shift": CARRY, "prior": "healthy", "proposals": "real"}, "go", "budget"),
    ],
)
def test_next_step_follows_the_results(inputs, case, level, command_word):
    changes = dict(case)
    if isinstance(changes.get("shift"), tuple):
        changes["shift"] = with_verdicts(inputs.shift, changes["shift"])
    if changes.get("prior") == "healthy":
        changes["prior"] = healthy(inputs.prior)
    for kind in ("proposals", "calibration"):
        if changes.get(kind) == "real":
            changes[kind] = getattr(inputs, kind)
    decision = decide(replace(inputs, **changes))
    assert decision.level == level
    assert decision.command is not None and command_word in decision.command
    assert decision.reasons
    if changes.get("calibration") is not None:  # the before/after of the calibration is part of the why
        after = inputs.calibration.shift_after.verdicts
        bad = sum(v == "does_not_carry_over" for v in after)
        assert f"at the calibrated physics {bad} of {len(after)} matched features do not carry over" in (
            decision.reasons
        )


def booked(budget, with_prior: int | None, cold_start: int | None):
    """The real budget booking ``with_prior`` and ``cold_start`` trials at its P80 level."""
    return replace(
        budget,
        confidence=0.8,
        with_prior=replace(budget.with_prior, p80=with_prior, book=with_prior),
        cold_start=replace(budget.cold_start, p80=cold_start, book=cold_start),
    )


def test_go_quotes_the_budget_p80_with_and_without_the_prior(inputs):
    ready = replace(inputs, shift=with_verdicts(inputs.shift, CARRY), prior=healthy(inputs.prior),
                    budget=booked(inputs.budget, 9, 22), proposals=replace(inputs.proposals, stop=None))
    decision = decide(ready)
    n = len(inputs.proposals.proposals)
    assert decision.level == "go" and decision.command is None
    assert f"Go to hardware with the {n} proposed trials" in decision.next_step
    assert "budget P80 = 9 trials (cold start 22)" in decision.next_step


def test_a_budget_not_reached_within_its_horizon_is_said_so_not_asked_for_again(inputs):
    budget = booked(inputs.budget, None, None)
    ready = replace(inputs, shift=with_verdicts(inputs.shift, CARRY), prior=healthy(inputs.prior), budget=budget)
    decision = decide(ready)
    assert decision.command is None
    assert f"budget P80 beyond the {budget.max_trials} trials planned for" in decision.next_step


def test_a_stop_rule_that_says_stop_ends_tuning_instead_of_more_trials(inputs):
    """The proposals' stop rule (a probabilistic regret bound, Wilson 2024) outranks the proposals."""
    stop = StopRule(probability=0.95, epsilon=0.02, level=0.9, stop=True, epsilon_rule="given",
                    decision="stop: 0.95 probability the current best is within 0.02 of the best (rule: stop at 0.9)")
    ready = replace(inputs, shift=with_verdicts(inputs.shift, CARRY), prior=healthy(inputs.prior),
                    proposals=replace(inputs.proposals, stop=stop))
    decision = decide(ready)
    assert decision.level == "go" and decision.next_step.startswith("Stop tuning")
    assert any(stop.decision in r for r in decision.reasons)
    keep = replace(stop, stop=False, decision="keep tuning: 0.40 probability ...")
    going = decide(replace(ready, proposals=replace(inputs.proposals, stop=keep)))
    assert going.next_step.startswith("Go to hardware") and "the stop rule says keep tuning" in going.next_step


def test_a_weak_rho_is_not_sold_as_go(inputs):
    weak = replace(healthy(inputs.prior), rho=0.2, rho_interval=(-0.3, 0.7))
    decision = decide(replace(inputs, shift=with_verdicts(inputs.shift, CARRY), prior=weak, calibration=None))
    assert decision.level == "caution"
    assert "calibrate" in decision.command
    assert any("rho = 0.2" in r for r in decision.reasons)


def test_a_joint_shift_asks_for_calibration_even_when_features_pass_one_by_one(inputs):
    """MMD p below the level (the Gretton et al. 2012 test of the shift step) outranks the per-feature
    verdicts: the next step is calibration, not hardware."""
    shift = with_verdicts(inputs.shift, CARRY, mmd_p_value=0.001)
    decision = decide(replace(inputs, shift=shift, prior=healthy(inputs.prior), calibration=None))
    assert decision.level == "caution" and "calibrate" in decision.command
    assert any("MMD, p = 0.001" in r for r in decision.reasons)


# ---- stores that hold less, and the arguments -----------------------------------------------


def test_no_sweep_asks_for_the_sweep(tmp_path):
    scenario = project(tmp_path)
    with build_store(scenario, tmp_path / "gapgauge.sqlite", sweep_rollouts=0, trials=0, kinds=()) as store:
        out = write_report(scenario, store, tmp_path / "empty.html")
    assert out.decision.command.startswith("gapgauge sweep ")
    assert not any(s.filled for s in out.sections)
    assert "No data for this section yet" in out.path.read_text(encoding="utf-8")


def test_a_store_that_never_saw_the_scenario_gets_a_report_that_asks_for_the_sweep(tmp_path):
    scenario = project(tmp_path)
    with Store(tmp_path / "new.sqlite") as store:
        out = write_report(scenario, store, tmp_path / "fresh.html")
    assert out.decision.level == "pending" and out.decision.command.startswith("gapgauge sweep ")


def test_report_refuses_an_output_that_is_not_html(lab, tmp_path):
    scenario, store, _ = lab
    with pytest.raises(StoreError, match="ending in .html"):
        write_report(scenario, store, tmp_path / "report.pdf")
    assert not (tmp_path / "report.json").exists()


def test_report_takes_paths_and_reports_progress(lab, full, tmp_path):
    scenario, store, _ = lab
    calls = []
    out = write_report(
        str(scenario.path), str(store.path), tmp_path / "again.html", progress=lambda *call: calls.append(call)
    )
    assert out.decision == full[0].decision
    assert calls[-1] == ("report", 3, 3) and [done for _, done, _ in calls] == [1, 2, 3]


def test_report_command_writes_the_report_and_refuses_a_missing_store(lab, tmp_path):
    scenario, store, _ = lab
    out = tmp_path / "out" / "r.html"
    ran = CliRunner().invoke(main, ["report", str(scenario.path), "--store", str(store.path), "--out", str(out)])
    assert ran.exit_code == 0, ran.output
    assert out.is_file() and out.with_suffix(".json").is_file()
    missing = CliRunner().invoke(main, ["report", str(scenario.path), "--store", str(tmp_path / "none.sqlite")])
    assert missing.exit_code == 2
    assert "store not found" in missing.output


def test_main_effects_match_the_analytic_first_order_sobol_indices():
    """y = x0 + 2 x1 on the unit square: S0 = 1/5, S1 = 4/5 (variance shares of independent uniform
    terms; Saltelli et al. 2008, ch. 4); binning into 10 bins keeps 99% of each term's variance."""
    x = np.random.default_rng(3).random((20_000, 3))
    effects = main_effects(x, x[:, 0] + 2 * x[:, 1])
    assert effects == pytest.approx([0.2 * 0.99, 0.8 * 0.99, 0.0], abs=0.01)
    # a U-shaped effect that a rank correlation would miss is still ranked first
    assert ranked_parameters(x, (x[:, 2] - 0.5) ** 2 + 0.1 * x[:, 0], 1) == [2]


# ---- the first screen's words agree with the tables below them ------------------------------


def test_first_screen_states_the_budget_as_a_number_with_its_target(full, lab):
    budget = lab[2]["budget"]
    body = page_text(full[1])
    book = budget.with_prior.book
    shown = f"{book} trials" if book is not None else f"> {budget.max_trials} trials"
    assert shown in body
    # the target with units: the scenario's success rule (recovery_time <= 2 s) and the objective level
    assert f"to reach: no fall, recovery time ≤ 2.00 s, objective ≤ {format_number(budget.target.level)}" in body


def test_the_key_figures_count_the_verdicts_as_the_shift_table_tags_them(full):
    _, text = full
    table = text[text.index('id="shift-table"'):text.index("</table>", text.index('id="shift-table"'))]
    tags = [" ".join(t.split()) for t in re.findall(r'<span class="tag v-\w+">([^<]+)</span>', table)]
    card = text[text.index('id="key-figures"'):]
    card = page_text(card[: card.index("</div>", card.index('class="value"'))])
    for word in set(tags):
        assert f"{tags.count(word)} {word}" in card, (word, card)


def test_the_calibration_finding_reads_as_the_issue_asks(inputs):
    """A trunk 16 % heavier than modelled, pinned down, the others at nominal: the sentence of issue 18."""
    params = [
        replace(p, estimate=1.16, identifiable=True) if p.name == "trunk_mass_scale"
        else replace(p, estimate=p.base_nominal)
        for p in inputs.calibration.parameters
    ]
    sentence = finding(replace(inputs.calibration, parameters=params))
    assert sentence.startswith("The robot behaves as if its trunk were 16 % heavier than modelled")
    assert "outside the randomised range [0.900, 1.10]" in sentence  # the scenario randomises 0.9 to 1.1


def test_detail_tables_and_figures_fold_away(full):
    _, text = full
    for inside in ("Joint tests over all features", "Per-feature figures", "How the budget was planned"):
        at = text.index(inside)
        assert text.rfind("<details", 0, at) > text.rfind("</details>", 0, at), inside
    first = text[text.index('id="first-screen"'):text.index("<main>")]
    assert first.count("<details") == 1  # only the reasons behind the verdict


def test_a_result_stored_in_an_older_format_is_left_out_with_the_step_to_run_again(lab, tmp_path, monkeypatch):
    scenario, store, _ = lab
    monkeypatch.setattr(BudgetPlan, "schema_version", BudgetPlan.schema_version + 1)  # as a newer gapgauge reads
    out = write_report(scenario, store, tmp_path / "older.html")
    budget = next(s for s in out.sections if s.name == "budget")
    assert not budget.filled and budget.fill_command.startswith("gapgauge budget ")
    assert "schema version" in budget.note
    assert "The stored result was left out" in page_text(out.path.read_text(encoding="utf-8"))
