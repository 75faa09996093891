"""Property-based tests (hypothesis): malformed CSV logs and sidecars give only the tool's own errors.

Each example starts from a valid log and sidecar and damages them (cells replaced by arbitrary text or
bytes, lines dropped, duplicated or swapped, the file cut at any byte, sidecars replaced by arbitrary
JSON or bytes). ``read_log`` must either accept the result or raise :class:`GapgaugeError` with a
one-line message; any other exception is a bug. 200 examples here; the robustness issue runs more.
"""

from __future__ import annotations

import json

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from gapgauge.errors import GapgaugeError
from gapgauge.logs import LogTrial, read_log
from test_logs_support import make_scenario, sidecar, table

EXAMPLES = 200


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    folder = tmp_path_factory.mktemp("fuzz")
    scenario = make_scenario(folder / "sc", lowpass=40.0)
    header, rows = table(rate_hz=150.0, duration=1.0)
    return scenario, folder, header, rows


def _check(scenario, path) -> None:
    try:
        result = read_log(scenario, path)
    except GapgaugeError as exc:
        assert "\n" not in str(exc) and str(exc)
    else:
        assert isinstance(result, LogTrial)


json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=10), inner, max_size=4),
    max_leaves=12,
)

cell_text = st.text(max_size=12) | st.sampled_from(
    ["nan", "inf", "-inf", "1e999", "=SUM(A1)", "", " ", '"', "1,2"]
)


@settings(max_examples=EXAMPLES, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_damaged_csv_gives_only_gapgauge_errors(setup, data):
    scenario, folder, header, rows = setup
    lines = [",".join(header)] + [",".join(r) for r in rows]
    for _ in range(data.draw(st.integers(0, 3), label="damages")):
        kind = data.draw(st.sampled_from(["cell", "drop", "dup", "swap", "insert", "header"]), label="kind")
        i = data.draw(st.integers(0, len(lines) - 1), label="line")
        if kind == "cell":
            cells = lines[i].split(",")
            j = data.draw(st.integers(0, len(cells) - 1), label="cell")
            cells[j] = data.draw(cell_text, label="text")
            lines[i] = ",".join(cells)
        elif kind == "drop" and len(lines) > 1:
            del lines[i]
        elif kind == "dup":
            lines.insert(i, lines[i])
        elif kind == "swap":
            k = data.draw(st.integers(0, len(lines) - 1), label="other")
            lines[i], lines[k] = lines[k], lines[i]
        elif kind == "insert":
            lines.insert(i, data.draw(st.text(max_size=40), label="new line"))
        elif kind == "header":
            lines[0] = data.draw(st.text(max_size=60), label="header")
    raw = ("\n".join(lines) + "\n").encode("utf-8", "surrogatepass")
    cut = data.draw(st.none() | st.integers(0, len(raw)), label="cut at")
    if cut is not None:
        raw = raw[:cut]
    junk = data.draw(st.none() | st.binary(min_size=1, max_size=30), label="junk")
    if junk is not None:
        at = data.draw(st.integers(0, len(raw)), label="junk at")
        raw = raw[:at] + junk + raw[at:]
    path = folder / "fuzz.csv"
    path.write_bytes(raw)
    (folder / "fuzz.json").write_text(json.dumps(sidecar(scenario)))
    _check(scenario, path)


@settings(max_examples=EXAMPLES, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    side=st.one_of(
        json_values.map(lambda v: json.dumps(v).encode()),
        st.binary(max_size=200),
        st.dictionaries(
            st.sampled_from(["params", "robot_id", "recorded_at", "outcome", "notes", "synthetic", "x"]),
            json_values,
        ).map(lambda d: json.dumps(d).encode()),
    ),
    params_patch=st.dictionaries(
        st.sampled_from(["ankle_kp", "knee_kd", "reaction_delay", "bogus"]), json_values, max_size=3
    ),
)
def test_damaged_sidecar_gives_only_gapgauge_errors(setup, side, params_patch):
    scenario, folder, header, rows = setup
    path = folder / "side.csv"
    path.write_text("\n".join(",".join(r) for r in [header, *rows]) + "\n")
    (folder / "side.json").write_bytes(side)
    _check(scenario, path)
    good = sidecar(scenario)
    good["params"].update(params_patch)
    (folder / "side.json").write_text(json.dumps(good))
    _check(scenario, path)
