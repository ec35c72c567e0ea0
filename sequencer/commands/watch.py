"""``fieldrun watch RUN_FOLDER``: follow a run from another terminal.

Read-only: it tails the folder's ``samples.csv`` and ``events.jsonl`` and never opens an
instrument. It ends when ``end.json`` appears (or at Ctrl-C). ``--once`` prints one
plain snapshot and exits.
"""
from __future__ import annotations

import sys
import time
from pathlib import Path
from typing import Any, Dict, List

from ..console import Console, RunView
from ..runfolder import (END_FILE, EVENTS_FILE, SAMPLES_FILE, LineTail, NotARunFolder,
                         RunFolder, parse_events, parse_samples, sample_from_row)

HELP = "follow a run in progress from its folder (read-only, no instrument access)"
DESCRIPTION = ("Show the live state of a run by reading its run folder: progress, voltage, "
               "current, pressure, watchdog state, recent events and an ln I trend. It never "
               "touches the instruments and ends when the run's end record appears.")


def add_arguments(p) -> None:
    p.add_argument("folder", metavar="RUN_FOLDER", help="the run folder to follow")
    p.add_argument("--once", action="store_true", help="print one snapshot and exit")
    p.add_argument("--interval", type=float, default=0.5, metavar="S",
                   help="seconds between reads of the folder (default 0.5)")
    p.add_argument("--plain", action="store_true", help="plain log lines, even on a terminal")
    p.add_argument("--stale", type=float, default=30.0, metavar="S",
                   help="say so when nothing new arrived for this many seconds (default 30)")


class FolderFeed:
    """Reads what was appended to a run folder since the last call and hands it on."""

    def __init__(self, rf: RunFolder):
        self.rf = rf
        self.samples = LineTail(rf.path / SAMPLES_FILE)
        self.events = LineTail(rf.path / EVENTS_FILE)

    def poll(self, view: RunView, console: Console = None) -> bool:
        """Feed new samples and events to ``view`` (or through ``console``); True when
        the end record exists (read after the data so nothing is missed)."""
        ended = (self.rf.path / END_FILE).exists()
        lines = self.samples.read()
        if lines:
            cols = parse_samples(b"\n".join(lines) + b"\n")
            n = len(cols["seq"])
            if n:
                t, cur, step = cols["t"], cols["current"], cols["step"]
                if view.first_t is None:
                    view.first_t = float(t[0])
                import numpy as np
                for k in np.concatenate(([0], np.flatnonzero(np.diff(step)) + 1)).tolist():
                    view._step_start.setdefault(int(step[k]), float(t[k]))   # step changes
                keep = max(0, n - view.trend.maxlen)
                view.trend.extend(zip(t[keep:n - 1].tolist(), cur[keep:n - 1].tolist()))
                last = sample_from_row(cols, n - 1)
                if console is not None:
                    console.update(last)
                else:
                    view.feed_sample(last)
        ev_lines = self.events.read()
        if ev_lines:
            for ev in parse_events(b"\n".join(ev_lines) + b"\n"):
                if console is not None:
                    console.event(ev)
                else:
                    view.feed_event(ev)
        if ended:
            view.ended = self.rf.end or {"outcome": "unknown"}
        return ended


def _title(rf: RunFolder) -> str:
    parts = [p for p in (rf.protocol_name, rf.sample_id) if p]
    return " · ".join(parts) or rf.name


def run(args) -> int:
    try:
        rf = RunFolder(Path(args.folder))
    except NotARunFolder:
        raise
    plan = rf.manifest.get("plan") if isinstance(rf.manifest.get("plan"), dict) else None
    if args.once:
        view = RunView(title=_title(rf), plan=plan)
        feed = FolderFeed(rf)
        feed.poll(view)
        print(view.plain_snapshot())
        return 0
    console = Console(title=_title(rf), plan=plan, plain=True if args.plain else None,
                      refresh_hz=max(0.5, 1.0 / max(0.05, args.interval)))
    feed = FolderFeed(rf)
    console.start()
    last_growth, size, warned = time.monotonic(), -1, False
    try:
        while not console.dead:
            if feed.poll(console.view, console):
                break
            grown = feed.samples.offset + feed.events.offset
            if grown != size:
                size, last_growth, warned = grown, time.monotonic(), False
            elif not warned and time.monotonic() - last_growth >= args.stale:
                warned = True
                console.event({"kind": "note", "t": console.view.sample.t if console.view.sample else None,
                               "message": f"nothing new for {args.stale:g} s and no end record: "
                                          f"the run may have stopped without one"})
            time.sleep(max(0.05, args.interval))
    except KeyboardInterrupt:
        pass
    finally:
        console.stop(timeout=2.0)
    if console.view.ended is not None and not console.dead:
        end = console.view.ended
        try:
            print(f"{rf.path}: {end.get('outcome')} (exit {end.get('exit_code')})")
        except OSError:
            pass
    return 0
