"""Property-based fuzzing of the scenario loader: whatever the file holds, only ScenarioError comes out.

Hypothesis mutates the bundled scenario (lines dropped, values swapped for other types, junk bytes)
and also feeds arbitrary bytes; a crash of any other type is a bug. 2,000 examples in CI.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from gapgauge import ScenarioError, load_scenario

ROOT = Path(__file__).resolve().parents[1]
BASE_LINES = (ROOT / "scenarios" / "push_recovery.toml").read_text().splitlines()
VALUE_LINES = [i for i, line in enumerate(BASE_LINES) if "=" in line and not line.lstrip().startswith("#")]

junk_values = st.one_of(
    st.integers(min_value=-(10**20), max_value=10**20).map(str),
    st.floats(allow_nan=True, allow_infinity=True).map(lambda v: repr(v).replace("inf", "inf").replace("nan", "nan")),
    st.text(max_size=20).map(lambda s: '"' + s.replace("\\", "").replace('"', "") + '"'),
    st.sampled_from(["true", "[]", "{}", "[1, 2]", '"../../etc/passwd.xml"', "[[1]]", '"deg"', "-0.0", "1e400"]),
)


@st.composite
def mutated_scenarios(draw) -> bytes:
    lines = list(BASE_LINES)
    for _ in range(draw(st.integers(min_value=1, max_value=4))):
        action = draw(st.sampled_from(["replace", "drop", "duplicate", "junk"]))
        i = draw(st.sampled_from(VALUE_LINES))
        if i >= len(lines):
            continue
        if action == "replace" and "=" in lines[i]:
            key = lines[i].split("=", 1)[0]
            lines[i] = f"{key}= {draw(junk_values)}"
        elif action == "drop":
            lines.pop(i)
        elif action == "duplicate":
            lines.insert(i, lines[i])
        else:
            lines.insert(i, draw(st.text(max_size=30)))
    return "\n".join(lines).encode("utf-8", "surrogatepass")


@pytest.fixture(scope="module")
def project(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("fuzz")
    (root / "models").mkdir()
    (root / "scenarios").mkdir()
    shutil.copy(ROOT / "models" / "planar_body.xml", root / "models")
    return root


def _load(project: Path, data: bytes) -> None:
    path = project / "scenarios" / "fuzz.toml"
    path.write_bytes(data)
    try:
        load_scenario(path)
    except ScenarioError as exc:
        message = str(exc)
        assert message and "\n" not in message
        assert str(path) in message


@settings(max_examples=1500, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=mutated_scenarios())
def test_mutated_scenario_raises_only_scenario_error(project: Path, data: bytes) -> None:
    _load(project, data)


@settings(max_examples=500, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.binary(max_size=2000))
def test_arbitrary_bytes_raise_only_scenario_error(project: Path, data: bytes) -> None:
    _load(project, data)
