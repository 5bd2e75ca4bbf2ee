"""The reference cases of ``chargesim verify``, run as tests.

The case table lives in :mod:`chargesim.verify` (each case names its source);
the tests run exactly that table, so the command and the suite cannot drift.
"""
import json

import pytest

from chargesim import verify


@pytest.mark.parametrize("case", verify.CASES, ids=[c.name for c in verify.CASES])
def test_reference_case(case):
    outcome = case.run()
    assert outcome.error is None, outcome.error
    assert outcome.passed, (
        f"{case.name}: computed {outcome.computed!r}, reference {case.reference!r} "
        f"({case.source}), deviation {outcome.deviation:.3g} > tolerance {case.tolerance:g}"
    )


def test_case_names_are_unique_and_sourced():
    names = [c.name for c in verify.CASES]
    assert len(names) == len(set(names))
    assert all(c.source for c in verify.CASES)


def test_a_failing_case_is_reported_not_raised():
    bad = verify.Case("always_off", lambda: 2.0, 1.0, "a deliberately wrong reference", 1e-3)
    crash = verify.Case("crashes", lambda: 1 / 0, 1.0, "a case that raises", 1e-3)
    out = verify.run_cases(cases=[bad, crash])
    assert [o.passed for o in out] == [False, False]
    assert "ZeroDivisionError" in out[1].error
    rec = out[0].as_dict()
    assert {"name", "computed", "reference", "source", "tolerance", "passed"} <= set(rec)
    json.dumps([o.as_dict() for o in out])  # JSON-ready
