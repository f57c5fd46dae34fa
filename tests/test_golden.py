"""The committed golden results (tests/golden/golden.json, made by scripts/make_golden.py).

Each case is rendered and analysed again and compared with what was committed: every key of
result.json (but the tool version) and every frame's diameter, floats to a relative 1e-7
(another machine's floating point, not drift), or to 5 % where the recording itself rendered
differently on this machine (its SHA-256 differs). A change that is meant to move the numbers
regenerates the file with the script in a commit of its own that says why.
"""

import importlib.util
import json
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
_spec = importlib.util.spec_from_file_location("make_golden", ROOT / "scripts" / "make_golden.py")
golden_script = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(golden_script)
GOLDEN = json.loads(golden_script.GOLDEN.read_text(encoding="utf-8"))


def test_every_case_has_a_golden_record():
    assert set(GOLDEN) == set(golden_script.cases())


@pytest.mark.slow
@pytest.mark.parametrize("name", sorted(golden_script.cases()))
def test_results_match_the_golden_record(name, tmp_path):
    record = golden_script.run_case(name, tmp_path)
    problems = golden_script.compare({name: GOLDEN[name]}, {name: record})
    assert not problems, "\n".join(problems[:20])


def test_the_comparison_sees_a_drift():
    record = json.loads(json.dumps(GOLDEN["beads-plates"]))
    record["result"]["relaxation_time_s"] *= 1 + 1e-6
    record["diameter_m"][40] = None
    problems = golden_script.differences(GOLDEN["beads-plates"], record)
    assert len(problems) == 2 and ".result.relaxation_time_s" in problems[0]


def test_a_recording_rendered_elsewhere_is_compared_loosely_but_still_sees_a_drift():
    record = json.loads(json.dumps(GOLDEN["beads-plates"]))
    record["result"]["source"]["sha256"] = "0" * 64
    record["result"]["relaxation_time_s"] *= 1 + 1e-3       # a few pixels rounded the other way
    assert golden_script.compare({"c": GOLDEN["beads-plates"]}, {"c": record}) == []
    record["result"]["relaxation_time_s"] *= 1.2              # the method drifted
    problems = golden_script.compare({"c": GOLDEN["beads-plates"]}, {"c": record})
    assert len(problems) == 1 and ".result.relaxation_time_s" in problems[0]
