"""``fieldrun report RUN_FOLDER``: analyse the run and write analysis/report.html (one
self-contained file, figures embedded) and analysis/report.md. The analysis settings last
used by ``fieldrun analyze`` on the folder are reused."""
from __future__ import annotations

HELP = "write a run's report: one self-contained HTML file and a Markdown twin"


def add_arguments(p) -> None:
    p.add_argument("run_folder", metavar="RUN_FOLDER", help="a run folder (runs/<UTC start>-<protocol>-<id>)")


def run(args) -> int:
    from ..report import build_report
    path = build_report(args.run_folder)
    print(path)
    return 0
