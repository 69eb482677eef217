"""The validation table of ``crosswind validate``: every case from validation/cases.toml, each with
its published source, run by the test suite (same data, same runner)."""
import pytest

from crosswind.validation import evaluate_case, format_table, load_cases

CASES = load_cases()


@pytest.mark.parametrize("case", CASES, ids=[c["name"] for c in CASES])
def test_validation_case(case):
    row = evaluate_case(case)
    assert row["passed"], format_table([row])


def test_every_case_names_a_source():
    for c in CASES:
        assert len(c["source"]) > 20 and any(ch.isdigit() for ch in c["source"]), c["name"]
