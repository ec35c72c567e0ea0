"""The run report: self-contained HTML (figures as base64 PNG), Markdown twin, everything
from the files escaped, and write_report never raising.

HTML escaping is checked against the standard library's html.escape (the reference for
which characters must be replaced); the hostile strings are the classic script and
attribute injections.
"""
import html
import json
import os
import re

import pytest

from sequencer.report import write_report
from test_analysis_support import mg_current, sweep_points, write_run_folder

PHI, GAP = 4.50, 500e-6
HOSTILE = '<script>alert("x")</script>"><img src=x onerror=alert(1)>'


def law(V):
    return mg_current(V, 2000, 1e-13, GAP, PHI)


@pytest.fixture(scope="module")
def tripped(tmp_path_factory):
    root = str(tmp_path_factory.mktemp("runs"))
    events = [
        {"seq": 40, "t": 4.0, "utc": 1.7e9, "kind": "verdict", "action": "hold", "rule": "current_rise",
         "value": 2e-7, "threshold": 1e-7, "unit": "A/s", "message": HOSTILE},
        {"seq": 300, "t": 30.0, "utc": 1.7e9, "kind": "trip", "rule": "arc", "message": "arc seen"},
        {"seq": 301, "t": 30.1, "utc": 1.7e9, "kind": "safe-off", "confirmed": True},
    ]
    f = write_run_folder(root, "20261201T130000Z-hostile-0f0f0f", law, sweep_points(400, 1400, 25), seed=81,
                         i_limit=20e-6, hold=(1000, 200), protocol_name=HOSTILE, sample="KL-F12",
                         events=events, end=False)
    with open(os.path.join(f, "end.json"), "w") as fh:
        json.dump({"outcome": "tripped", "exit_code": 3, "reason": "arc " + HOSTILE, "confirmed_off": True}, fh)
    path = write_report(f)
    assert path is not None
    with open(path, encoding="utf-8") as fh:
        page = fh.read()
    with open(os.path.join(f, "analysis", "report.md"), encoding="utf-8") as fh:
        md = fh.read()
    return f, page, md


def test_html_escapes_a_hostile_protocol_name(tripped):
    _, page, _ = tripped
    assert "<script" not in page.lower()
    assert "onerror=alert(1)>" not in page
    assert html.escape(HOSTILE, quote=True) in page
    assert "<img src=x" not in page


def test_html_is_self_contained_with_embedded_figures(tripped):
    _, page, _ = tripped
    imgs = re.findall(r'<img[^>]*src="([^"]*)"', page)
    assert len(imgs) >= 3
    assert all(s.startswith("data:image/png;base64,") for s in imgs)
    assert not re.search(r'(src|href)="(https?:|//|file:)', page)


def test_report_says_outcome_trust_and_lists_the_trip(tripped):
    _, page, md = tripped
    assert "tripped" in page and "exit code" in page
    assert "Can these numbers be trusted?" in page
    assert "apparently reasonable" in page
    assert "trip" in page and "arc seen" in page
    assert "Dwell stability" in page


def test_markdown_escapes_too(tripped):
    # Outside indented code blocks (which CommonMark shows literally, section 4.4) nothing
    # from the files may reach the page as markup.
    f, _, md = tripped
    prose = "\n".join(ln for ln in md.splitlines() if not ln.startswith("    "))
    assert "<script" not in prose.lower()
    assert "&lt;script&gt;" in prose
    for name in ("iv.png", "forms.png", "timeline.png"):
        assert f"]({name})" in md
        assert os.path.exists(os.path.join(f, "analysis", name))


def test_incomplete_folder_is_reported_as_incomplete(tmp_path):
    # BRIEF.md: "A folder without end.json is incomplete."
    from sequencer.analysis.run import run_meta
    from sequencer.report import content
    f = write_run_folder(str(tmp_path), "20261201T140000Z-cut-000001", law, sweep_points(500, 1300, 50),
                         seed=82, end=False)
    rows = dict(content.outcome(run_meta(f)))
    assert rows["outcome"].startswith("incomplete: the folder has no end.json")


def test_write_report_never_raises(tmp_path, caplog, monkeypatch):
    # The engine calls write_report at the end of every run: a failure inside must come back
    # as None with a log line, never as an exception.
    assert write_report(str(tmp_path / "missing")) is None
    assert write_report(None) is None
    broken = tmp_path / "broken"
    broken.mkdir()
    (broken / "samples.csv").write_text("this is not,a run folder\n1,2\n")
    path = write_report(str(broken))                      # unreadable samples: a report without fits
    assert "No field-emission analysis" in open(path, encoding="utf-8").read()
    from sequencer.report import html as rhtml

    def boom(*a, **k):
        raise RuntimeError("renderer broke")
    monkeypatch.setattr(rhtml, "render", boom)
    with caplog.at_level("ERROR", logger="fieldrun.report"):
        assert write_report(str(broken)) is None
    assert "report for" in caplog.text and "renderer broke" in caplog.text


def test_a_run_without_samples_still_gets_a_report(tmp_path):
    # A run refused at arm: manifest, events and end.json, no samples.csv (BRIEF.md run
    # folder format). The report must still give the outcome and the events.
    f = tmp_path / "20261201T150000Z-refused-abcdef"
    f.mkdir()
    (f / "manifest.json").write_text(json.dumps({"protocol": {"name": "first-light"}, "sample": {"id": "KL-T03"}}))
    (f / "events.jsonl").write_text(json.dumps({"seq": 0, "t": 0.0, "utc": 1.7e9, "kind": "note",
                                                "message": "output found on at arm"}) + "\n")
    (f / "end.json").write_text(json.dumps({"outcome": "refused", "exit_code": 2,
                                            "reason": "output found on at arm", "confirmed_off": True}))
    path = write_report(str(f))
    assert path is not None
    page = open(path, encoding="utf-8").read()
    assert "refused" in page and "output found on at arm" in page and "No field-emission analysis" in page
