"""Hostile input: every command refuses bad arguments with exit 2 and one line (never a traceback); a
model MuJoCo cannot use, a gigabyte log, binary junk, huge arrays and paths that leave the project are
refused before any work; formula-like notes are stored verbatim and shown as text.

Outside checks: click's own exit status and exception (``SystemExit(2)``), the rows read with the
standard library's ``sqlite3``, the HTML parsed with the standard library's ``html.parser`` (what a
browser's tokenizer sees as tags and attributes), and the filesystem (a sparse file's size on disk).
"""

from __future__ import annotations

import builtins
import io
import json
import sqlite3
from html.parser import HTMLParser
from pathlib import Path

import pytest
from click.testing import CliRunner

from gapgauge import ScenarioError, load_scenario
from gapgauge.app.ingest import ingest
from gapgauge.app.report import write_report
from gapgauge.cli import main
from gapgauge.errors import LogError
from gapgauge.logs import read_log
from gapgauge.records import TrialRecord
from gapgauge.store import Store
from test_logs_support import make_scenario, sidecar, table, write_log
from test_report_support import build_store
from test_robust_support import make_project, run

FORMULAS = ["=CMD(\"calc\")!A0", "+1", "-2+3", "@SUM(A1:A9)", "=HYPERLINK(\"http://x.invalid\",\"click\")",
            "\t=1+1", "<script>alert('n')</script>"]


@pytest.fixture(scope="module")
def project(tmp_path_factory) -> Path:
    project = make_project(tmp_path_factory.mktemp("project"))
    Store(project.parent.parent / "empty.sqlite").close()
    (project.parent.parent / "notes.sqlite").write_text("time,ankle\n0,1\n")
    return project


def commands(project: Path) -> list[tuple[str, list[str]]]:
    """(what is wrong, argv) for every command: a missing scenario, a missing store, a file that is no
    store, a bad option value."""
    root = project.parent.parent
    sc, missing, empty, notes = str(project), str(root / "missing.sqlite"), str(root / "empty.sqlite"), \
        str(root / "notes.sqlite")
    profile = str(project.parent / "standin" / "close.toml")
    cases = [
        ("sweep: missing scenario", ["sweep", str(root / "nope.toml"), "--store", empty]),
        ("sweep: store is not SQLite", ["sweep", sc, "--rollouts", "1", "--store", notes]),
        ("sweep: store in a missing folder", ["sweep", sc, "--rollouts", "1",
                                              "--store", str(root / "no" / "s.sqlite")]),
        ("sweep: bad rollouts", ["sweep", sc, "--rollouts", "0", "--store", empty]),
        ("sweep: bad design", ["sweep", sc, "--design", "grid", "--store", empty]),
        ("info: missing store", ["info", "--store", missing]),
        ("info: store is not SQLite", ["info", "--store", notes]),
        ("ingest: missing scenario", ["ingest", str(root / "nope.toml"), "a.csv", "--store", empty]),
        ("ingest: missing log", ["ingest", sc, str(root / "nolog.csv"), "--store", empty]),
        ("ingest: bad matches", ["ingest", sc, "a.csv", "--matches", "0", "--store", empty]),
        ("ingest: store is not SQLite", ["ingest", sc, "a.csv", "--store", notes]),
        ("standin: missing scenario", ["standin", str(root / "nope.toml"), "--profile", profile, "--design", "1",
                                       "--out", str(root / "o")]),
        ("standin: missing profile", ["standin", sc, "--profile", str(root / "np.toml"), "--design", "1",
                                      "--out", str(root / "o")]),
        ("standin: neither params nor design", ["standin", sc, "--profile", profile, "--out", str(root / "o")]),
        ("standin: params not JSON", ["standin", sc, "--profile", profile, "--params", notes,
                                      "--out", str(root / "o")]),
        ("store check: missing store", ["store", "check", "--store", missing]),
        ("store check: store is not SQLite", ["store", "check", "--store", notes]),
        ("report: output not HTML", ["report", sc, "--store", empty, "--out", str(root / "r.txt")]),
    ]
    for command in ("shift", "prior", "propose", "budget", "calibrate", "report"):
        cases += [
            (f"{command}: missing scenario", [command, str(root / "nope.toml"), "--store", empty]),
            (f"{command}: missing store", [command, sc, "--store", missing]),
            (f"{command}: store is not SQLite", [command, sc, "--store", notes]),
        ]
    cases += [
        ("shift: no trials yet", ["shift", sc, "--store", empty]),
        ("prior: no sweep yet", ["prior", sc, "--store", empty]),
        ("propose: bad fall risk", ["propose", sc, "--store", empty, "--max-fall-risk", "0"]),
        ("budget: target value not finite", ["budget", sc, "--store", empty, "--target-value", "nan"]),
        ("calibrate: no trials yet", ["calibrate", sc, "--store", empty]),
    ]
    return cases


CASES = [name for name, _ in commands(Path("/p/scenarios/short.toml"))]


@pytest.mark.parametrize("case", CASES)
def test_every_command_refuses_bad_input_with_exit_2_and_one_line(project, case):
    argv = dict(commands(project))[case]
    result = CliRunner().invoke(main, argv)
    assert result.exit_code == 2, result.output
    assert isinstance(result.exception, SystemExit), result.exception  # not a crash that click caught
    assert "Traceback" not in result.output
    ours = [line for line in result.output.splitlines() if line.startswith("error:")]
    usage = [line for line in result.output.splitlines() if line.startswith("Error:")]  # click's own usage error
    if case == "ingest: missing log":  # a batch: its table lists each failed file with its reason
        assert "0 stored, 0 already stored, 1 failed" in result.output
    elif ours:
        assert len(result.output.strip().splitlines()) == 1
    else:
        assert len(usage) == 1
    assert not (project.parent.parent / "missing.sqlite").exists()  # nothing created for a missing store


@pytest.mark.parametrize("mjcf", [
    "<mujoco><worldbody></worldbody></mujoco>\n",  # valid MJCF, but not the planar body
    '<mujoco model="x">\n<worldbody><body name="a">\n',  # cut off
    '<mujoco model="x">\n<include file="../../outside/missing.xml"/>\n</mujoco>\n',  # an include that leaves
], ids=["no-actuators", "truncated", "include-outside"])
def test_a_model_mujoco_cannot_use_is_one_line_before_anything_is_stored(tmp_path, mjcf):
    project = make_project(tmp_path)
    (tmp_path / "models" / "planar_body.xml").write_text(mjcf)
    store = tmp_path / "s.sqlite"
    swept = CliRunner().invoke(main, ["sweep", str(project), "--rollouts", "4", "--store", str(store)])
    assert swept.exit_code == 2 and isinstance(swept.exception, SystemExit), swept.output
    assert "key 'model'" in swept.output and len(swept.output.strip().splitlines()) == 1
    assert not store.exists()  # refused before the store was opened
    scenario = load_scenario(make_scenario(tmp_path / "good").path)  # a log that is fine
    log = write_log(tmp_path / "logs", *table(rate_hz=150.0, duration=1.0), sidecar(scenario))
    with Store(store) as db, pytest.raises(ScenarioError, match="key 'model'"):
        ingest(load_scenario(project), db, [log], matches=2, progress=False)
    with sqlite3.connect(store) as conn:
        assert conn.execute("SELECT COUNT(*) FROM trials").fetchone()[0] == 0


def test_the_command_line_process_itself_exits_2_without_a_traceback(tmp_path):
    project = make_project(tmp_path)
    (tmp_path / "models" / "planar_body.xml").write_text("<mujoco><worldbody></worldbody></mujoco>\n")
    result = run("sweep", project, "--rollouts", "4", "--store", tmp_path / "s.sqlite")
    assert result.returncode == 2 and "Traceback" not in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1


@pytest.fixture(scope="module")
def log_scenario(tmp_path_factory):
    return make_scenario(tmp_path_factory.mktemp("logsc"), lowpass=40.0)


def test_a_gigabyte_log_is_refused_by_its_size_without_being_opened(tmp_path, log_scenario, monkeypatch):
    path = tmp_path / "huge.csv"
    with open(path, "wb") as fh:  # sparse: a gigabyte long, next to nothing on disk
        fh.truncate(10**9)
    (tmp_path / "huge.json").write_text(json.dumps(sidecar(log_scenario)))
    assert path.stat().st_size == 10**9 and path.stat().st_blocks * 512 < 10**6
    opened = []
    real_open = builtins.open

    def guarded_open(file, *args, **kwargs):
        opened.append(str(file))
        return real_open(file, *args, **kwargs)

    monkeypatch.setattr(builtins, "open", guarded_open)
    monkeypatch.setattr(io, "open", guarded_open)
    with pytest.raises(LogError) as err:
        read_log(log_scenario, path)
    assert "1000.0 MB is over the limit of 200 MB" in str(err.value) and "\n" not in str(err.value)
    assert str(path) not in opened


@pytest.mark.parametrize("junk", [
    bytes(range(256)) * 8,  # every byte value
    b"\x89PNG\r\n\x1a\n" + b"\x00\x00\x00\rIHDR" + b"\xff" * 64,  # an image saved as .csv
    "time_ms,ankle\n0,1\n".encode("utf-16"),  # UTF-16 with its byte-order mark
    b"PK\x03\x04" + b"\x14\x00" * 40,  # a zip archive
    b"\r" * 5000,  # carriage returns only
    b"time_ms" + b",x" * 300_000 + b"\n",  # one header line of 600 kB
], ids=["all-bytes", "png", "utf16", "zip", "carriage-returns", "wide-header"])
def test_binary_junk_named_csv_is_refused_with_one_line_naming_the_file(tmp_path, log_scenario, junk):
    path = tmp_path / "junk.csv"
    path.write_bytes(junk)
    (tmp_path / "junk.json").write_text(json.dumps(sidecar(log_scenario)))
    with pytest.raises(LogError) as err:
        read_log(log_scenario, path)
    assert str(path) in str(err.value) and "\n" not in str(err.value)


def test_formula_like_notes_and_robot_ids_are_stored_verbatim(tmp_path):
    scenario = make_scenario(tmp_path / "sc", lowpass=40.0)
    header, rows = table(rate_hz=150.0, duration=1.0)
    logs = [write_log(tmp_path / "logs", header, rows, sidecar(scenario, notes=text, robot_id=text[::-1]),
                      name=f"trial_{i:03d}") for i, text in enumerate(FORMULAS)]
    with Store(tmp_path / "s.sqlite") as store:
        summary = ingest(scenario, store, logs, matches=1, progress=False)
    assert not summary.failed
    with sqlite3.connect(tmp_path / "s.sqlite") as conn:
        stored = conn.execute("SELECT notes, robot_id FROM trials ORDER BY id").fetchall()
    assert stored == [(text, text[::-1]) for text in FORMULAS]


class Page(HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def test_formula_like_notes_show_as_text_in_the_report_and_its_json(tmp_path):
    scenario = load_scenario(Path(__file__).resolve().parents[1] / "scenarios" / "push_recovery.toml")
    store = build_store(scenario, tmp_path / "lab.sqlite", kinds=(), trials=0)
    x = scenario.params_to_mapping(scenario.nominal_parameters())
    for i, text in enumerate(FORMULAS):
        store.add_trial(TrialRecord(
            scenario_hash=scenario.content_hash, source_path=f"/lab/{i}.csv", sha256=f"{i:064d}", params=x,
            robot_id=text, recorded_at="2024-05-01T09:30:00+00:00", outcome="stood", notes=text,
            synthetic=False, features={"fell": 0.0}, objective=1.0))
    result = write_report(scenario, store, tmp_path / "report.html")
    store.close()
    html = result.path.read_text(encoding="utf-8")
    page = Page()
    page.feed(html)
    body = "".join(page.text)
    for text in FORMULAS:
        assert text.strip() in body  # shown exactly, not evaluated, no quote or apostrophe added
    assert not [t for t, _ in page.tags if t == "script"]
    summary = json.loads(result.json_path.read_text())
    dumped = json.dumps(summary)
    assert all(json.dumps(text)[1:-1] in dumped for text in FORMULAS)


def test_a_huge_array_in_a_scenario_is_refused_with_its_key(tmp_path):
    project = make_project(tmp_path)
    text = project.read_text().replace("low = 450.0", "low = [" + ", ".join(["1.5"] * 150_000) + "]", 1)
    project.write_text(text)
    assert project.stat().st_size < 1_000_000  # under the size limit: the loader itself must say no
    with pytest.raises(ScenarioError) as err:
        load_scenario(project)
    assert "low" in str(err.value) and "\n" not in str(err.value) and len(str(err.value)) < 600


def test_a_model_symlink_to_elsewhere_loads_the_file_it_points_at(tmp_path):
    # Models may live anywhere on disk (issue 13): a symlink is followed, and the model that is
    # simulated (and keyed) is the file it points at.
    project = make_project(tmp_path / "inside")
    outside = tmp_path / "elsewhere" / "planar_body.xml"
    outside.parent.mkdir()
    (tmp_path / "inside" / "models" / "planar_body.xml").rename(outside)
    (tmp_path / "inside" / "models" / "planar_body.xml").symlink_to(outside)
    assert load_scenario(project).model_path == outside.resolve()
