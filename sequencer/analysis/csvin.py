"""Reading readings: a run folder's ``samples.csv`` (format in BRIEF.md / the recorder)
and outside CSV files from older set-ups.

Outside CSV: comment lines start with ``#``; the delimiter is found by csv.Sniffer
(comma, semicolon, tab or spaces); a first row that is not all numbers is the header. The
voltage and current columns are found from header names that say what they are and, in
brackets, parentheses, after a slash or an underscore, their unit (``Voltage (kV)``,
``I [uA]``, ``U/V``, ``current_nA``). Units are read with pint (an edge of the program, as
DESIGN.md asks). ``--voltage-column`` / ``--current-column`` name a column (or give its
1-based index) and may add a unit after a colon: ``2:kV``.
"""
from __future__ import annotations

import csv
import io
import math
import os
import re
from dataclasses import dataclass, field
from typing import Dict, List, Optional

import numpy as np

from ..errors import FieldrunError

RUN_COLUMNS = ("seq", "utc", "t", "t_v", "t_i", "t_p", "setpoint", "voltage", "gap_voltage",
               "current", "supply_current", "range", "pressure", "pressure_age", "step",
               "step_kind", "cc", "overflow", "interlock", "status")
_TRUE = {"1", "true", "yes", "y", "on", "t"}
_FALSE = {"0", "false", "no", "n", "off", "f"}


class AnalysisInputError(FieldrunError):
    """Data that cannot be analysed as given (missing file, unknown columns, no points)."""

    exit_code = 2


@dataclass
class Readings:
    """Rows of readings as SI numpy arrays (NaN / '' where a column is absent)."""

    n: int
    t: np.ndarray
    utc: np.ndarray
    setpoint: np.ndarray
    voltage: np.ndarray
    gap_voltage: np.ndarray
    current: np.ndarray
    pressure: np.ndarray
    step: np.ndarray               # int, -1 when unknown
    step_kind: List[str]
    cc: np.ndarray                 # bool
    overflow: np.ndarray           # bool
    interlock_open: np.ndarray     # bool (True only when the file says the chain was open)
    status: List[str]
    source: str                    # "run-folder" or "csv"
    path: str
    columns: Dict[str, str] = field(default_factory=dict)   # role -> column as written
    notes: List[str] = field(default_factory=list)


def _float(s: str) -> float:
    s = s.strip()
    if not s:
        return math.nan
    try:
        return float(s)
    except ValueError:
        try:
            return float(s.replace(",", "."))
        except ValueError:
            return math.nan


def _bool(s: str) -> Optional[bool]:
    s = s.strip().lower()
    if s in _TRUE:
        return True
    if s in _FALSE:
        return False
    return None


_HEADER = re.compile(r"^\s*([A-Za-z_][\w ]*?)\s*\[([^\]]*)\]\s*$")


def read_run_samples(path: str) -> Readings:
    """Read a run folder's samples.csv (header of ``name[unit]`` columns, SI units)."""
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            rows = list(csv.reader(fh))
    except OSError as exc:
        raise AnalysisInputError(f"cannot read {path}: {exc.strerror or exc}") from None
    if not rows:
        raise AnalysisInputError(f"{path} is empty")
    names = []
    for h in rows[0]:
        m = _HEADER.match(h)
        names.append(m.group(1).strip() if m else h.strip())
    idx = {n: i for i, n in enumerate(names)}
    if "current" not in idx or ("voltage" not in idx and "setpoint" not in idx):
        raise AnalysisInputError(f"{path}: header has no current[A] and voltage[V] columns "
                                 "(is this a run folder's samples.csv?)")
    body = [r for r in rows[1:] if r and any(c.strip() for c in r)]

    def col(name, conv=_float, default=math.nan):
        i = idx.get(name)
        if i is None:
            return [default] * len(body)
        return [conv(r[i]) if i < len(r) else default for r in body]

    def fl(name):
        return np.array(col(name), dtype=float)

    step = np.array([int(v) if v == v else -1 for v in col("step")], dtype=int)
    cc = np.array([bool(b) for b in col("cc", _bool, None)], dtype=bool)
    ov = np.array([bool(b) for b in col("overflow", _bool, None)], dtype=bool)
    il = np.array([b is False for b in col("interlock", _bool, None)], dtype=bool)
    status = [s.strip() for s in col("status", str, "")]
    for k, s in enumerate(status):
        flags = set(s.split("|")) if s else set()
        if "cc" in flags:
            cc[k] = True
        if "overflow" in flags:
            ov[k] = True
        if "interlock-open" in flags:
            il[k] = True
    return Readings(
        n=len(body), t=fl("t"), utc=fl("utc"), setpoint=fl("setpoint"), voltage=fl("voltage"),
        gap_voltage=fl("gap_voltage"), current=fl("current"), pressure=fl("pressure"),
        step=step, step_kind=[s.strip() for s in col("step_kind", str, "")], cc=cc, overflow=ov,
        interlock_open=il, status=status, source="run-folder", path=path,
        columns={n: rows[0][i] for n, i in idx.items()})


# ---- outside CSV -------------------------------------------------------------------

_ROLE_WORDS = {
    "voltage": r"(voltage|volt|bias|hv|u|v|vgap|v_?gap|u_?hv|supply_?voltage|v_?meas|vmeas)",
    "setpoint": r"(setpoint|set|v_?set|vset|u_?set)",
    "current": r"(current|curr|emission|i|ie|i_?e|i_?meas|imeas|i_?emission)",
    "time": r"(time|t|elapsed|seconds)",
    "pressure": r"(pressure|p|vacuum)",
}
_DEFAULT_UNIT = {"voltage": "V", "setpoint": "V", "current": "A", "time": "s", "pressure": "Pa"}
_DIMENSION = {"voltage": "[electric_potential]", "setpoint": "[electric_potential]",
              "current": "[current]", "time": "[time]", "pressure": "[pressure]"}
def _ureg():
    """fieldrun's one pint registry (sequencer.quantities)."""
    from ..quantities import registry
    return registry()


def unit_factor(unit: str, role: str) -> float:
    """SI multiplier of ``unit`` for a column of ``role`` (pint), or raise."""
    u = unit.strip().replace("µ", "u").replace("μ", "u")
    if u in ("", "-"):
        return 1.0
    try:
        q = _ureg()(u)
        if not hasattr(q, "dimensionality"):
            raise ValueError(u)
        if q.dimensionality != _ureg().get_dimensionality(_DIMENSION[role]):
            raise AnalysisInputError(f"unit {unit!r} is not a unit of {role}")
        return float(q.to_base_units().magnitude)
    except AnalysisInputError:
        raise
    except Exception:  # pint raises several types for unknown units
        raise AnalysisInputError(f"unknown unit {unit!r} for the {role} column") from None


def split_header(h: str):
    """'Voltage (kV)' -> ('voltage', 'kV'); 'I [uA]' -> ('i', 'uA'); 'U/kV' -> ('u', 'kV');
    'current_nA' -> ('current', 'nA'); 'V' -> ('v', '')."""
    s = h.strip().strip('"').strip()
    m = re.match(r"^(.*?)\s*[\[(]\s*([^\])]*)\s*[\])]\s*$", s)
    if m:
        return m.group(1).strip().lower(), m.group(2).strip()
    m = re.match(r"^(.*?)\s*/\s*([^/]+)$", s)
    if m and m.group(1):
        return m.group(1).strip().lower(), m.group(2).strip()
    m = re.match(r"^(.*?)[_ ]((?:[kmunpµμM]?)(?:V|A|s|Pa|mbar|Torr|min|h))$", s)
    if m and m.group(1):
        return m.group(1).strip().lower(), m.group(2)
    return s.lower(), ""


def _role_of(name: str) -> Optional[str]:
    key = re.sub(r"[\s\-]+", "_", name)
    for role in ("setpoint", "voltage", "current", "time", "pressure"):
        if re.fullmatch(_ROLE_WORDS[role], key):
            return role
    tokens = set(re.split(r"[_\W]+", key))
    for role, words in _ROLE_TOKENS:
        if tokens & words:
            return role
    return None


# Longer words that name a column's role anywhere in a multi-word header.
_ROLE_TOKENS = (("setpoint", {"setpoint"}), ("current", {"current", "emission"}),
                ("voltage", {"voltage", "bias"}), ("time", {"time", "elapsed"}),
                ("pressure", {"pressure", "vacuum"}))


def _sniff(text: str):
    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise AnalysisInputError("the CSV file has no data rows")
    sample = "\n".join(lines[:20])
    try:
        dialect = csv.Sniffer().sniff(sample, delimiters=",;\t ")
        delim = dialect.delimiter
    except csv.Error:
        delim = ","
    if delim == " ":
        rows = [ln.split() for ln in lines]
    else:
        rows = list(csv.reader(io.StringIO("\n".join(lines)), delimiter=delim))
    return rows


def _is_number(s: str) -> bool:
    return _float(s) == _float(s) or s.strip().lower() == "nan"


def _pick(spec: Optional[str], header: List[str], role: str, guessed: Dict[str, int], ncol: int = 0):
    """(column index, unit) for a role from an option ``NAME_OR_INDEX[:UNIT]`` or the guess."""
    if spec:
        name, _, unit = spec.partition(":")
        name = name.strip()
        if name.isdigit():
            i = int(name) - 1
            width = len(header) or ncol
            if not 0 <= i < width:
                raise AnalysisInputError(f"--{role}-column {name}: the file has {width} columns")
            hu = split_header(header[i])[1] if header and i < len(header) else ""
            return i, unit or hu
        low = [h.strip().strip('"') for h in header]
        if name in low:
            i = low.index(name)
            return i, unit or split_header(low[i])[1]
        raise AnalysisInputError(f"--{role}-column {name!r}: no such column (columns: {', '.join(low)})")
    if role in guessed:
        i = guessed[role]
        return i, split_header(header[i])[1]
    return None, ""


def read_outside_csv(path: str, voltage_column: Optional[str] = None,
                     current_column: Optional[str] = None) -> Readings:
    """Read an outside CSV file (module docstring)."""
    try:
        with open(path, encoding="utf-8-sig", errors="replace") as fh:
            text = fh.read()
    except OSError as exc:
        raise AnalysisInputError(f"cannot read {path}: {exc.strerror or exc}") from None
    rows = _sniff(text)
    header: List[str] = []
    if rows and not all(_is_number(c) for c in rows[0] if c.strip()):
        header, rows = rows[0], rows[1:]
    ncol = max((len(r) for r in rows), default=0)
    guessed: Dict[str, int] = {}
    for i, h in enumerate(header):
        role = _role_of(split_header(h)[0])
        if role and role not in guessed:
            guessed[role] = i
    if "voltage" not in guessed and "setpoint" in guessed:
        guessed["voltage"] = guessed["setpoint"]
    notes = []
    if not header and not (voltage_column and current_column):
        if ncol == 2:
            guessed = {"voltage": 0, "current": 1}
            header = ["", ""]
            notes.append("no header: first column taken as voltage in V, second as current in A")
        else:
            raise AnalysisInputError(f"{path}: no header row; say which columns hold voltage and "
                                     "current with --voltage-column N[:UNIT] --current-column N[:UNIT]")
    vi, vu = _pick(voltage_column, header, "voltage", guessed, ncol)
    ci, cu = _pick(current_column, header, "current", guessed, ncol)
    if vi is None or ci is None:
        missing = " and ".join(r for r, i in (("voltage", vi), ("current", ci)) if i is None)
        shown = ", ".join(header) or "none"
        if len(shown) > 80:
            shown = shown[:77] + "..."
        raise AnalysisInputError(f"{path}: cannot tell which column holds the {missing} "
                                 f"(header: {shown}); use --voltage-column "
                                 "and --current-column")
    for role, unit in (("voltage", vu), ("current", cu)):
        if not unit:
            notes.append(f"{role} column has no unit: read as {_DEFAULT_UNIT[role]}")
    vf, cf = unit_factor(vu, "voltage"), unit_factor(cu, "current")

    def column(i, factor):
        return np.array([_float(r[i]) * factor if i < len(r) else math.nan for r in rows], dtype=float)

    V = column(vi, vf)
    I = column(ci, cf)
    # negative polarity (cathode at negative high voltage, or a reversed ammeter): fieldrun
    # works on magnitudes in the emission sense, as the recorder writes them
    for name, arr in (("voltage", V), ("current", I)):
        fin = arr[np.isfinite(arr)]
        if fin.size and np.median(fin) < 0:
            arr *= -1.0
            notes.append(f"{name} column is negative (polarity): its magnitude is used")
    n = len(rows)
    t = np.full(n, math.nan)
    P = np.full(n, math.nan)
    cols = {"voltage": header[vi] if header else str(vi + 1), "current": header[ci] if header else str(ci + 1)}
    if "time" in guessed and voltage_column is None:
        ti = guessed["time"]
        t = column(ti, unit_factor(split_header(header[ti])[1], "time"))
        cols["time"] = header[ti]
    if "pressure" in guessed:
        pi = guessed["pressure"]
        P = column(pi, unit_factor(split_header(header[pi])[1], "pressure"))
        cols["pressure"] = header[pi]
    both = np.isfinite(V) & np.isfinite(I)
    if np.count_nonzero(both) == 0:
        raise AnalysisInputError(f"{path}: no row has both a voltage and a current number")
    if not np.all(both):
        first = int(np.flatnonzero(~both)[0]) + 1          # counted after the header
        notes.append(f"{n - int(np.count_nonzero(both))} row(s) without a voltage and a current number "
                     f"set aside (the first is data row {first})")
    nan = np.full(n, math.nan)
    return Readings(n=n, t=t, utc=nan.copy(), setpoint=V.copy(), voltage=V, gap_voltage=nan.copy(),
                    current=I, pressure=P, step=np.full(n, -1, dtype=int), step_kind=[""] * n,
                    cc=np.zeros(n, bool), overflow=np.zeros(n, bool), interlock_open=np.zeros(n, bool),
                    status=[""] * n, source="csv", path=path, columns=cols, notes=notes)


# files of a run folder (or protocols) that a user may hand to analyze by mistake
NOT_DATA = (".yaml", ".yml", ".json", ".jsonl", ".html", ".md", ".png")


def read_any(path: str, voltage_column=None, current_column=None) -> Readings:
    """A run folder (its samples.csv), a run folder's samples.csv, or an outside CSV."""
    if os.path.isdir(path):
        p = os.path.join(path, "samples.csv")
        if not os.path.exists(p):
            raise AnalysisInputError(f"{path} is a folder without samples.csv (not a run folder)")
        return read_run_samples(p)
    if not os.path.exists(path):
        raise AnalysisInputError(f"{path}: no such file or folder")
    if os.path.splitext(path)[1].lower() in NOT_DATA:
        raise AnalysisInputError(f"{path}: not a data file; give a run folder or a CSV file of "
                                 "voltage and current")
    with open(path, encoding="utf-8-sig", errors="replace") as fh:
        first = fh.readline()
    if first.startswith("seq[") and "current[A]" in first and not (voltage_column or current_column):
        return read_run_samples(path)
    return read_outside_csv(path, voltage_column, current_column)
