"""Run reports: one self-contained HTML file (figures embedded as base64 PNG) and a
Markdown twin, written to RUN_FOLDER/analysis/report.html and report.md.

``write_report(run_folder)`` is what the engine calls at the end of every run, tripped ones
included: it never raises (it logs and returns None on any failure), so a failing report
can never replace the run's own exit code.
"""
from __future__ import annotations

import logging
import os
from typing import Optional

log = logging.getLogger("fieldrun.report")
RUN_FILES = ("manifest.json", "events.jsonl", "samples.csv", "end.json")


def options_from_results(folder: str):
    """The analysis options last used on this folder (analysis/results.json), else defaults."""
    import json
    from ..analysis import run as arun
    try:
        with open(os.path.join(folder, "analysis", "results.json"), encoding="utf-8") as fh:
            st = json.load(fh).get("settings") or {}
    except (OSError, ValueError, AttributeError):
        return arun.Options()
    fit = bool(st.get("series_resistance_fit"))
    return arun.Options(
        phi=st.get("phi_ev") if st.get("phi_source") == "option" else None,
        phi_u=st.get("phi_u_ev") or arun.extract.DEFAULT_PHI_UNCERTAINTY_EV,
        # an assumed default stays a default (and is labelled so), not an option
        gap=st.get("gap_m"), gap_u=st.get("gap_u_m") if st.get("gap_u_source") == "option" else None,
        series_r=None if fit else st.get("series_resistance_ohm"), fit_r=fit,
        diameter=st.get("diameter_m"), v_ref=st.get("v_ref"))


def build_report(run_folder: str, opt=None) -> str:
    """Analyse the folder and write report.html and report.md; returns the HTML path.
    Raises on failure (``write_report`` is the guarded form)."""
    from ..analysis import run as arun
    from . import html as rhtml, markdown as rmd
    from ..analysis.csvin import AnalysisInputError
    if not os.path.isdir(run_folder):
        raise AnalysisInputError(f"{run_folder}: not a run folder")
    if not any(os.path.exists(os.path.join(run_folder, n)) for n in RUN_FILES):
        # a run refused before its first sample still has its manifest or events; a folder
        # with none of these is not a run (a typo, runs/ itself, an analysis/ folder)
        raise AnalysisInputError(f"{run_folder}: not a run folder (none of {', '.join(RUN_FILES)})")
    opt = opt or options_from_results(run_folder)
    meta = arun.run_meta(run_folder)
    try:
        res = arun.analyze(run_folder, opt)
    except AnalysisInputError as exc:
        # no usable samples (a run refused or tripped before the first one): the report
        # still gives the outcome, the events and the protocol
        res = arun.no_data_results(run_folder, meta, str(exc))
    events = arun.read_events(run_folder)
    out = res["_out_dir"]
    page = rhtml.render(res, meta, events)
    path = os.path.join(out, "report.html")
    for name, text in ((path, page), (os.path.join(out, "report.md"), rmd.render(res, meta, events))):
        tmp = name + ".tmp"
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
        os.replace(tmp, name)
    return path


def write_report(run_folder) -> Optional[str]:
    """Build the report of ``run_folder``; on any failure log it and return None."""
    try:
        return build_report(os.fspath(run_folder))
    except Exception:  # noqa: BLE001 - the engine's end-of-run path must not fail here
        try:
            log.exception("report for %s failed", run_folder)
        except Exception:  # noqa: BLE001
            pass
        return None
