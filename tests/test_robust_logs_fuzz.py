"""More property-based fuzzing of the log reader (hypothesis), on small files so that many examples run.

tests/test_logs_fuzz.py runs 2 x 200 examples of structured damage; these 1,100 + 600 bring the log
reader to 2,100 examples in CI. Byte-level damage here (bits flipped, bytes inserted, deleted or
replaced, the file cut, arbitrary binary in place of the file or the sidecar): ``read_log`` either
accepts the result or raises :class:`GapgaugeError` with one line; any other exception is a bug.
And any text in a sidecar's ``notes`` and ``robot_id`` (formula-like, markup, control characters)
comes back verbatim: the reader stores text, it never interprets it.
"""

from __future__ import annotations

import json

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from gapgauge.errors import GapgaugeError
from gapgauge.logs import LogTrial, read_log
from test_logs_support import make_scenario, sidecar, table

BYTE_EXAMPLES = 1100
TEXT_EXAMPLES = 600


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    folder = tmp_path_factory.mktemp("fuzz-bytes")
    scenario = make_scenario(folder / "sc", lowpass=40.0)
    header, rows = table(rate_hz=150.0, duration=0.6)  # ~90 rows: small, still a valid log
    raw = ("\n".join(",".join(r) for r in [header, *rows]) + "\n").encode()
    side = json.dumps(sidecar(scenario)).encode()
    return scenario, folder, raw, side


def read_once(scenario, path) -> LogTrial | None:
    try:
        return read_log(scenario, path)
    except GapgaugeError as exc:
        text = str(exc)
        assert text and "\n" not in text, text
        assert path.stem in text, text  # names the log or its sidecar
        return None


@st.composite
def damaged(draw, raw: bytes) -> bytes:
    data = bytearray(raw)
    for _ in range(draw(st.integers(1, 6), label="damages")):
        kind = draw(st.sampled_from(["flip", "insert", "delete", "replace", "cut", "splice"]), label="kind")
        at = draw(st.integers(0, max(len(data) - 1, 0)), label="at")
        if kind == "flip" and data:
            data[at] ^= 1 << draw(st.integers(0, 7), label="bit")
        elif kind == "insert":
            data[at:at] = draw(st.binary(min_size=1, max_size=16), label="bytes")
        elif kind == "delete":
            del data[at:at + draw(st.integers(1, 64), label="length")]
        elif kind == "replace" and data:
            data[at] = draw(st.sampled_from(b"\x00,\n\r\"'-+.eE9 \t\xff\xfe"), label="byte")
        elif kind == "cut":
            del data[at:]
        elif kind == "splice":  # a chunk of the file repeated elsewhere (lines duplicated, half rows)
            length = draw(st.integers(1, 200), label="length")
            data[draw(st.integers(0, len(data)), label="to"):0] = data[at:at + length]
    return bytes(data)


@settings(max_examples=BYTE_EXAMPLES, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_byte_level_damage_to_a_log_or_its_sidecar_gives_only_gapgauge_errors(setup, data):
    scenario, folder, raw, side = setup
    target = data.draw(st.sampled_from(["csv", "sidecar", "both", "binary"]), label="target")
    log_bytes = data.draw(damaged(raw), label="csv") if target in ("csv", "both") else raw
    side_bytes = data.draw(damaged(side), label="sidecar") if target in ("sidecar", "both") else side
    if target == "binary":
        log_bytes = data.draw(st.binary(max_size=400), label="binary csv")
    path = folder / "trial.csv"
    path.write_bytes(log_bytes)
    (folder / "trial.json").write_bytes(side_bytes)
    read_once(scenario, path)


free_text = st.text(max_size=80) | st.sampled_from(
    ["=CMD(\"calc\")!A0", "+1", "-1", "@SUM(A1:A9)", "=1+1", "\t=x", "<script>alert(1)</script>",
     "'; DROP TABLE trials;--", "{{7*7}}", "${jndi:ldap://x}", "\u202eevil", "\x00", "\ud800"]
)


@settings(max_examples=TEXT_EXAMPLES, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(notes=free_text, robot_id=free_text)
def test_any_notes_and_robot_id_come_back_verbatim_or_are_refused_in_one_line(setup, notes, robot_id):
    scenario, folder, raw, _ = setup
    path = folder / "text.csv"
    path.write_bytes(raw)
    try:
        side = json.dumps(sidecar(scenario, notes=notes, robot_id=robot_id)).encode("utf-8", "surrogatepass")
    except UnicodeEncodeError:  # pragma: no cover - json escapes surrogates as \\ud800
        return
    (folder / "text.json").write_bytes(side)
    trial = read_once(scenario, path)
    if trial is not None:
        assert (trial.notes, trial.robot_id) == (notes, robot_id)
