"""The fault table (issue 9, item 5) cannot silently rot: it is generated from the
catalogue and the recorded results, every catalogue row has a test and a result in the
committed table, and the committed table matches the catalogue's ids and expected
outcomes."""
from pathlib import Path

import pytest

from tests.faults import catalogue
from tools import fault_table

ROOT = Path(__file__).resolve().parents[1]
TABLE = ROOT / "docs" / "fault-table.md"


def test_ids_are_unique_and_every_row_has_an_expected_outcome():
    ids = [f.id for f in catalogue.FAULTS]
    assert len(ids) == len(set(ids))
    for f in catalogue.FAULTS:
        assert f.item in ("9.1", "9.2", "9.3")
        assert f.why and f.injected
        if f.off is None:
            assert f.exit is None and f.outcome_note, f.id   # killed rows say what else
        else:
            assert f.exit in (0, 1, 2, 3, 4, 5), f.id
            assert (f.exit == 5) == (f.off is False), f.id   # unsafe <=> exit 5


def test_every_row_is_run_by_one_fault_test_module():
    import tests.test_faults_instruments as m1
    import tests.test_faults_hooks as m2
    import tests.test_faults_process as m3
    covered = [f.id for m in (m1, m2, m3) for f in m.ROWS]
    assert sorted(covered) == sorted(f.id for f in catalogue.FAULTS)
    for f in catalogue.FAULTS:
        assert f.runner in m3.RUNNERS


def test_committed_table_matches_the_catalogue():
    assert TABLE.exists(), "docs/fault-table.md missing: run the fault tests, then tools/fault_table.py"
    assert fault_table.main(["--check", "--out", str(TABLE)]) == 0


def test_committed_table_has_a_result_for_every_row_and_all_met():
    text = TABLE.read_text(encoding="utf-8")
    rows = {line.split(" | ")[0].strip("| `"): line for line in text.splitlines()
            if line.startswith("| `")}
    for f in catalogue.FAULTS:
        line = rows[f.id]
        assert "NOT RUN" not in line and "NOT MET" not in line, line
        if f.known_gap:
            assert "known gap" in line
        else:
            assert "| met: " in line, line


def test_render_refuses_a_row_without_result_and_shows_failures():
    first, second = catalogue.FAULTS[0], catalogue.FAULTS[1]
    with pytest.raises(SystemExit, match="no result"):
        fault_table.render({"rows": {}})
    text = fault_table.render({"rows": {first.id: {"met": False, "actual": "exit 1",
                                                   "problems": ["no end record"]}}},
                              allow_missing=True)
    assert f"| `{first.id}` |" in text and "NOT MET: exit 1; no end record" in text
    assert f"| `{second.id}` |" in text and "NOT RUN" in text
