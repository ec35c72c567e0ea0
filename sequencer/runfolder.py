"""One folder per run: create it, write its manifest and end record, and read it back.

Layout (see BRIEF.md "Run folder format" and docs/dev-recorder.md)::

    <runs_dir>/<YYYYmmddTHHMMSSZ>-<sanitised protocol name>-<6 hex>/
        manifest.json   written once at start (atomic)
        protocol.yaml   rig.yaml   dialects/*   byte copies of the inputs
        samples.csv     one row per sample, floats as repr() (the Recorder writes it)
        events.jsonl    one JSON object per line (the Recorder writes it)
        end.json        written last (atomic); a folder without it is incomplete
        analysis/       written by analysis, beside the raw files

Writers here are synchronous and meant for the start and the end of a run, never for
the sample loop. Readers are tolerant of what a power cut or ``kill -9`` leaves behind:
a truncated last line is ignored, a missing ``end.json`` means "incomplete".
"""
from __future__ import annotations

import csv
import enum
import hashlib
import io
import json
import math
import os
import re
import secrets
import shutil
import time
import unicodedata
from pathlib import Path
from typing import Any, Callable, Dict, Iterable, Iterator, List, Optional, Sequence, Tuple, Union

from .errors import FieldrunError

SCHEMA_VERSION = 1
SAMPLES_FILE = "samples.csv"
EVENTS_FILE = "events.jsonl"
MANIFEST_FILE = "manifest.json"
END_FILE = "end.json"
ANALYSIS_DIR = "analysis"
NAME_CAP = 40

# (column header, Sample attribute or None for a derived column, kind)
# kind: f = float (repr), i = int, s = string, b = bool 1/0, o = optional bool 1/0/empty
COLUMNS: Tuple[Tuple[str, str, str], ...] = (
    ("seq[]", "seq", "i"),
    ("utc[s]", "utc", "f"),
    ("t[s]", "t", "f"),
    ("t_v[s]", "t_v", "f"),
    ("t_i[s]", "t_i", "f"),
    ("t_p[s]", "t_p", "f"),
    ("setpoint[V]", "setpoint_v", "f"),
    ("voltage[V]", "voltage_v", "f"),
    ("gap_voltage[V]", "gap_voltage_v", "f"),
    ("current[A]", "current_a", "f"),
    ("supply_current[A]", "supply_current_a", "f"),
    ("range[A]", "range_a", "f"),
    ("pressure[Pa]", "pressure_pa", "f"),
    ("pressure_age[s]", "pressure_age_s", "f"),
    ("step[]", "step_index", "i"),
    ("step_kind[]", "step_kind", "s"),
    ("cc[]", "cc", "b"),
    ("overflow[]", "overflow", "b"),
    ("interlock[]", "interlock_ok", "o"),
    ("status[]", "flags", "s"),
)
HEADER = ",".join(c[0] for c in COLUMNS)
COLUMN_NAMES = tuple(c[0].split("[", 1)[0] for c in COLUMNS)


class NotARunFolder(FieldrunError):
    """The path given is not a run folder (no manifest, no samples, no events)."""

    exit_code = 2


# --------------------------------------------------------------------------- file ops
class FileOps:
    """The file operations the recorder and the atomic writers use, on ``os.*``.

    Tests substitute a subclass to simulate a failing write or a full disk (raise
    ``OSError(errno.ENOSPC, ...)``) or a slow disk (block in ``write``).
    """

    def open(self, path: Union[str, Path]) -> int:
        return os.open(str(path), os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)

    def write(self, fd: int, data: bytes) -> int:
        return os.write(fd, data)

    def fsync(self, fd: int) -> None:
        os.fsync(fd)

    def close(self, fd: int) -> None:
        os.close(fd)

    def fsync_dir(self, path: Union[str, Path]) -> None:
        fsync_dir(path)


def fsync_dir(path: Union[str, Path]) -> None:
    """fsync a directory so that entries created or renamed in it survive a power cut."""
    fd = os.open(str(path), os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_all(ops: FileOps, fd: int, data: bytes) -> None:
    """Write every byte (``os.write`` may write fewer than asked)."""
    view = memoryview(data)
    while view:
        n = ops.write(fd, view)
        if n is None or n <= 0:
            raise OSError(f"write returned {n!r}")
        view = view[n:]


def atomic_write(path: Union[str, Path], data: bytes, ops: Optional[FileOps] = None) -> None:
    """Write ``data`` to ``path`` so a reader sees the old file or the whole new one:
    a temp file in the same directory, fsync, rename over ``path``, fsync the directory."""
    ops = ops or FileOps()
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{secrets.token_hex(4)}.tmp")
    fd = os.open(str(tmp), os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
    try:
        write_all(ops, fd, data)
        ops.fsync(fd)
    except BaseException:
        os.close(fd)
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    os.close(fd)
    os.replace(tmp, path)
    ops.fsync_dir(path.parent)


# --------------------------------------------------------------------------- JSON
def _json_clean(obj: Any) -> Any:
    """Strict JSON: non-finite floats become null; tuples/sets become lists; Paths and
    enums become strings."""
    if isinstance(obj, enum.Enum):
        return str(obj.name).lower()  # e.g. Action.BACK_OFF -> "back_off"
    if isinstance(obj, float):
        return float(obj) if math.isfinite(obj) else None
    if isinstance(obj, (str, int, bool)) or obj is None:
        return obj
    if isinstance(obj, dict):
        return {str(k): _json_clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set, frozenset)):
        return [_json_clean(v) for v in obj]
    if isinstance(obj, Path):
        return str(obj)
    try:
        import numpy as np
        if isinstance(obj, np.generic):
            return _json_clean(obj.item())
        if isinstance(obj, np.ndarray):
            return _json_clean(obj.tolist())
    except ImportError:  # pragma: no cover
        pass
    if hasattr(obj, "__dataclass_fields__"):
        import dataclasses
        return _json_clean(dataclasses.asdict(obj))
    return str(obj)


def dumps(obj: Any, **kw) -> str:
    """JSON text as fieldrun writes it: strict (no NaN), floats exact (repr)."""
    return json.dumps(_json_clean(obj), allow_nan=False, ensure_ascii=False, **kw)


def verdict_fields(verdict) -> Dict[str, Any]:
    """The fields of a ``Verdict`` for a ``verdict`` (or ``trip``) event."""
    return {
        "action": verdict.action.name.lower(),
        "rule": verdict.rule,
        "value": verdict.value,
        "threshold": verdict.threshold,
        "unit": verdict.unit,
        "message": verdict.message,
        "release": verdict.release,
    }


# --------------------------------------------------------------------------- naming
def sanitise_name(name: Any, cap: int = NAME_CAP) -> str:
    """A protocol name made safe as one path component.

    NFKD to ASCII, keep letters, digits, '_' and '-', every other run of characters
    becomes one '-', leading/trailing '-' stripped, at most ``cap`` characters, ``run``
    when nothing is left. No separators and no dots survive, so the result can neither
    climb out of the runs directory nor be '.' or '..'.
    """
    text = unicodedata.normalize("NFKD", str(name)).encode("ascii", "ignore").decode("ascii")
    text = re.sub(r"[^A-Za-z0-9_-]+", "-", text)
    text = re.sub(r"-{2,}", "-", text).strip("-_")
    text = text[:cap].strip("-_")
    return text or "run"


def folder_name(start_utc: float, protocol_name: Any, suffix: str) -> str:
    stamp = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime(start_utc))
    return f"{stamp}-{sanitise_name(protocol_name)}-{suffix}"


_NAME_RE = re.compile(r"^(\d{8}T\d{6}Z)-(.+)-([0-9a-f]{6})$")


def create_run_folder(runs_dir: Union[str, Path], protocol_name: Any, utc: Optional[float] = None,
                      *, suffix: Optional[Callable[[], str]] = None, attempts: int = 64,
                      ops: Optional[FileOps] = None) -> Path:
    """Create a new, empty run folder exclusively and fsync its parent.

    ``utc`` (default ``time.time()``) gives the name's time stamp; ``suffix`` (default
    6 random hex digits) is drawn again whenever the name is taken, so campaign workers
    starting in the same second never share a folder.
    """
    ops = ops or FileOps()
    runs_dir = Path(runs_dir)
    runs_dir.mkdir(parents=True, exist_ok=True)
    stamp = time.time() if utc is None else float(utc)
    draw = suffix or (lambda: secrets.token_hex(3))
    for _ in range(attempts):
        path = runs_dir / folder_name(stamp, protocol_name, draw())
        try:
            os.mkdir(path, 0o755)
        except FileExistsError:
            continue
        ops.fsync_dir(runs_dir)
        return path
    raise FileExistsError(f"{runs_dir}: no free run folder name after {attempts} attempts")


# --------------------------------------------------------------------------- writers
def sha256_file(path: Union[str, Path]) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 16), b""):
            h.update(chunk)
    return h.hexdigest()


def copy_inputs(folder: Union[str, Path], protocol: Optional[Union[str, Path]] = None,
                rig: Optional[Union[str, Path]] = None,
                dialects: Iterable[Union[str, Path]] = (),
                ops: Optional[FileOps] = None) -> Dict[str, Dict[str, str]]:
    """Copy the input files into the folder byte for byte; return their names with the
    source path and sha256 (of the copy, checked equal to the source)."""
    folder = Path(folder)
    out: Dict[str, Dict[str, str]] = {}
    items: List[Tuple[str, Path]] = []
    if protocol is not None:
        items.append(("protocol.yaml", Path(protocol)))
    if rig is not None:
        items.append(("rig.yaml", Path(rig)))
    for d in dialects:
        d = Path(d)
        items.append((f"dialects/{sanitise_name(d.stem, 60)}{d.suffix if d.suffix in ('.yaml', '.yml') else '.yaml'}", d))
    for rel, src in items:
        data = src.read_bytes()
        dest = folder / rel
        dest.parent.mkdir(exist_ok=True)
        atomic_write(dest, data, ops)
        out[rel] = {"source": str(src), "sha256": hashlib.sha256(data).hexdigest()}
    return out


def _versions() -> Dict[str, str]:
    import platform
    import sys
    from . import __version__
    v = {"python": sys.version.split()[0], "platform": platform.platform(), "fieldrun": __version__}
    for mod in ("pyvisa", "pyvisa_py", "serial", "numpy"):
        try:
            m = __import__(mod)
            v[mod] = str(getattr(m, "__version__", getattr(m, "VERSION", "?")))
        except Exception:  # noqa: BLE001 - an absent optional package is just absent
            pass
    return v


def write_manifest(folder: Union[str, Path], manifest: Dict[str, Any],
                   ops: Optional[FileOps] = None) -> Dict[str, Any]:
    """Write ``manifest.json`` atomically; adds ``schema``, ``fieldrun_version`` and
    ``versions`` when the caller did not. Returns what was written."""
    from . import __version__
    m = dict(manifest)
    m.setdefault("schema", SCHEMA_VERSION)
    m.setdefault("fieldrun_version", __version__)
    m.setdefault("versions", _versions())
    m.setdefault("written_utc", time.time())
    atomic_write(Path(folder) / MANIFEST_FILE, (dumps(m, indent=2) + "\n").encode(), ops)
    return m


def write_end(folder: Union[str, Path], outcome: str, exit_code: int, reason: str,
              confirmed_off: Optional[bool], ops: Optional[FileOps] = None,
              **extra: Any) -> Dict[str, Any]:
    """Write ``end.json`` atomically (temp file, fsync, rename, dir fsync)."""
    rec = {"outcome": outcome, "exit_code": int(exit_code), "reason": reason,
           "confirmed_off": confirmed_off, "utc": time.time()}
    rec.update(extra)
    atomic_write(Path(folder) / END_FILE, (dumps(rec, indent=2) + "\n").encode(), ops)
    return rec


# --------------------------------------------------------------------------- rows
def format_row(s) -> str:
    """One CSV line (with newline) for a Sample; floats as repr() so they read back
    exactly."""
    il = s.interlock_ok
    step_kind = s.step_kind or ""
    status = "|".join(s.flags)
    # one row is one line, always, and text carries no control characters (a NUL or a
    # line break would tear the row for every CSV reader): each becomes a space
    step_kind = text_field(step_kind)
    status = text_field(status)
    if any(c in step_kind for c in ',"\n\r'):
        step_kind = _csv_quote(step_kind)
    if any(c in status for c in ',"\n\r'):
        status = _csv_quote(status)
    return (f"{int(s.seq)},{float(s.utc)!r},{float(s.t)!r},{float(s.t_v)!r},{float(s.t_i)!r},"
            f"{float(s.t_p)!r},{float(s.setpoint_v)!r},{float(s.voltage_v)!r},"
            f"{float(s.gap_voltage_v)!r},{float(s.current_a)!r},{float(s.supply_current_a)!r},"
            f"{float(s.range_a)!r},{float(s.pressure_pa)!r},{float(s.pressure_age_s)!r},"
            f"{int(s.step_index)},{step_kind},{1 if s.cc else 0},{1 if s.overflow else 0},"
            f"{'' if il is None else (1 if il else 0)},{status}\n")


_CONTROL = {c: " " for c in list(range(0x00, 0x20)) + [0x7f, 0x85, 0x2028, 0x2029]}


def text_field(text: str) -> str:
    """``text`` with every ASCII control character (NUL, CR, LF, tab, ...) and the Unicode
    line separators (NEL, U+2028, U+2029) replaced by a space, as written to samples.csv."""
    return text.translate(_CONTROL)


def _csv_quote(text: str) -> str:
    buf = io.StringIO()
    csv.writer(buf, lineterminator="").writerow([text])
    return buf.getvalue()


def complete_lines(data: bytes) -> bytes:
    """The bytes up to and including the last newline (a torn last line is dropped)."""
    cut = data.rfind(b"\n")
    return data[:cut + 1] if cut >= 0 else b""


def _row_ok(fields: List[str]) -> bool:
    try:
        for (_h, _a, kind), v in zip(COLUMNS, fields):
            if kind == "f":
                float(v)
            elif kind == "i":
                int(v)
            elif kind == "b" and v not in ("0", "1"):
                return False
            elif kind == "o" and v not in ("", "0", "1"):
                return False
    except ValueError:
        return False
    return True


def parse_samples(data: bytes) -> Dict[str, Any]:
    """Columns (name without unit -> numpy array) from the bytes of samples.csv.

    Tolerant: a truncated last line, a line with the wrong number of fields and a line
    whose numbers do not parse are skipped (power loss or kill -9 leave at most one).
    Floats are parsed by numpy from the repr() text, which reads back the same double.
    """
    import numpy as np
    text = complete_lines(data).decode("utf-8", errors="replace")
    lines = text.split("\n")[:-1]          # only '\n' ends a row (not \x1e, \u2028, ...)
    if lines and lines[0].startswith("seq"):
        lines = lines[1:]
    ncol = len(COLUMNS)
    if '"' in text:                       # a quoted field: let the csv module split
        rows = [r for r in csv.reader(lines) if len(r) == ncol]
    else:                                 # the usual case: plain split is much faster
        rows = [r for r in (line.split(",") for line in lines) if len(r) == ncol]

    def convert(rows):
        cols: Dict[str, Any] = {}
        table = np.array(rows, dtype=str).reshape(len(rows), ncol)
        for j, (_h, _a, kind) in enumerate(COLUMNS):
            name = COLUMN_NAMES[j]
            strs = table[:, j]
            if kind == "f":
                cols[name] = strs.astype(np.float64)
            elif kind == "i":
                cols[name] = strs.astype(np.int64)
            elif kind == "b":
                if not np.isin(strs, ("0", "1")).all():
                    raise ValueError(name)
                cols[name] = strs == "1"
            elif kind == "o":
                if not np.isin(strs, ("", "0", "1")).all():
                    raise ValueError(name)
                cols[name] = np.where(strs == "", "nan", strs).astype(np.float64)
            else:
                cols[name] = strs.astype(str)
        return cols

    try:
        return convert(rows)
    except ValueError:
        return convert([r for r in rows if _row_ok(r)])


def parse_events(data: bytes) -> List[Dict[str, Any]]:
    """Events from the bytes of events.jsonl; a torn or unparsable line is skipped."""
    out: List[Dict[str, Any]] = []
    for line in complete_lines(data).splitlines():
        if not line.strip():
            continue
        try:
            ev = json.loads(line)
        except ValueError:
            continue
        if isinstance(ev, dict):
            out.append(ev)
    return out


def sample_from_row(cols: Dict[str, Any], k: int):
    """The ``Sample`` of row ``k`` of parsed columns."""
    from .sample import Sample
    il = cols["interlock"][k]
    status = str(cols["status"][k])
    return Sample(
        seq=int(cols["seq"][k]), t=float(cols["t"][k]), utc=float(cols["utc"][k]),
        setpoint_v=float(cols["setpoint"][k]), voltage_v=float(cols["voltage"][k]),
        gap_voltage_v=float(cols["gap_voltage"][k]), current_a=float(cols["current"][k]),
        supply_current_a=float(cols["supply_current"][k]), range_a=float(cols["range"][k]),
        pressure_pa=float(cols["pressure"][k]), pressure_age_s=float(cols["pressure_age"][k]),
        t_v=float(cols["t_v"][k]), t_i=float(cols["t_i"][k]), t_p=float(cols["t_p"][k]),
        step_index=int(cols["step"][k]), step_kind=str(cols["step_kind"][k]),
        interlock_ok=None if math.isnan(il) else bool(il),
        flags=tuple(status.split("|")) if status else (),
    )


# --------------------------------------------------------------------------- reader
def _read_json(path: Path) -> Optional[Dict[str, Any]]:
    try:
        data = path.read_bytes()
    except OSError:
        return None
    try:
        obj = json.loads(data)
    except ValueError:
        return None
    return obj if isinstance(obj, dict) else None


class RunFolder:
    """Read-only view of one run folder (complete or not)."""

    def __init__(self, path: Union[str, Path]):
        self.path = Path(path)
        if not self.path.is_dir():
            raise NotARunFolder(f"{self.path}: not a directory")
        if not _NAME_RE.match(self.path.name) and not any(
                (self.path / f).exists() for f in (MANIFEST_FILE, SAMPLES_FILE, EVENTS_FILE, END_FILE)):
            raise NotARunFolder(f"{self.path}: not a run folder (no manifest, samples or events)")
        self._cols: Optional[Dict[str, Any]] = None

    def __repr__(self) -> str:
        return f"RunFolder({str(self.path)!r})"

    @property
    def name(self) -> str:
        return self.path.name

    @property
    def manifest(self) -> Dict[str, Any]:
        return _read_json(self.path / MANIFEST_FILE) or {}

    @property
    def end(self) -> Optional[Dict[str, Any]]:
        return _read_json(self.path / END_FILE)

    @property
    def complete(self) -> bool:
        return self.end is not None

    @property
    def outcome(self) -> str:
        end = self.end
        if end is None:
            return "incomplete"
        return str(end.get("outcome", "unknown"))

    @property
    def analysis_dir(self) -> Path:
        return self.path / ANALYSIS_DIR

    @property
    def start_utc(self) -> Optional[float]:
        m = _NAME_RE.match(self.name)
        if m:
            import calendar
            return float(calendar.timegm(time.strptime(m.group(1), "%Y%m%dT%H%M%SZ")))
        w = self.manifest.get("written_utc")
        return float(w) if isinstance(w, (int, float)) else None

    @property
    def protocol_name(self) -> str:
        p = self.manifest.get("protocol")
        if isinstance(p, dict) and p.get("name"):
            return str(p["name"])
        if isinstance(p, str):
            return p
        m = _NAME_RE.match(self.name)
        return m.group(2) if m else ""

    @property
    def sample_id(self) -> str:
        m = self.manifest
        s = m.get("sample")
        if isinstance(s, dict) and s.get("id"):
            return str(s["id"])
        if isinstance(s, str):
            return s
        if m.get("sample_id"):
            return str(m["sample_id"])
        p = m.get("protocol")
        if isinstance(p, dict):
            ps = p.get("sample")
            if isinstance(ps, dict) and ps.get("id"):
                return str(ps["id"])
            if isinstance(ps, str):
                return ps
        return ""

    def _read(self, name: str) -> bytes:
        try:
            return (self.path / name).read_bytes()
        except FileNotFoundError:
            return b""

    def samples(self) -> Dict[str, Any]:
        """Columns of samples.csv (name without unit -> numpy array); re-read each call."""
        self._cols = parse_samples(self._read(SAMPLES_FILE))
        return self._cols

    def events(self, kind: Union[None, str, Sequence[str]] = None) -> List[Dict[str, Any]]:
        evs = parse_events(self._read(EVENTS_FILE))
        if kind is None:
            return evs
        kinds = (kind,) if isinstance(kind, str) else tuple(kind)
        return [e for e in evs if e.get("kind") in kinds]

    def iter_samples(self) -> Iterator[Any]:
        cols = self.samples()
        for k in range(len(cols["seq"])):
            yield sample_from_row(cols, k)

    def analysis_results(self) -> Optional[Dict[str, Any]]:
        return _read_json(self.analysis_dir / "results.json")


def _start_key(rf: "RunFolder") -> Tuple[str, float, str]:
    m = _NAME_RE.match(rf.name)
    w = rf.manifest.get("written_utc")
    if not isinstance(w, (int, float)):
        try:
            w = rf.path.stat().st_mtime
        except OSError:
            w = 0.0
    return (m.group(1) if m else "", float(w), rf.name)


def list_runs(runs_dir: Union[str, Path]) -> List[RunFolder]:
    """The run folders directly under ``runs_dir``, oldest first: by the name's UTC
    stamp, then (within one second) by when the manifest was written."""
    d = Path(runs_dir)
    out: List[RunFolder] = []
    if not d.is_dir():
        return out
    for p in d.iterdir():
        if not p.is_dir() or p.name.startswith("."):
            continue
        try:
            out.append(RunFolder(p))
        except NotARunFolder:
            continue
    out.sort(key=_start_key)
    return out


class LineTail:
    """Read the complete lines appended to a file since the last call (for ``watch``)."""

    def __init__(self, path: Union[str, Path]):
        self.path = Path(path)
        self.offset = 0
        self._pending = b""

    def read(self, limit: int = 1 << 24) -> List[bytes]:
        try:
            with open(self.path, "rb") as f:
                f.seek(self.offset)
                data = f.read(limit)
        except FileNotFoundError:
            return []
        if not data:
            return []
        self.offset += len(data)
        data = self._pending + data
        cut = data.rfind(b"\n")
        if cut < 0:
            self._pending = data
            return []
        self._pending = data[cut + 1:]
        return data[:cut + 1].splitlines()
