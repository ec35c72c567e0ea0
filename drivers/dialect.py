"""Dialect files: what differs between instrument models, as data (YAML), not code.

A dialect holds command templates, reply parsing, ranges, setting resolution and readback
tolerance, output-off threshold and bleed-down time, worst-case reply and integration
times. Built-in dialects live in ``drivers/dialects/<name>.yaml``; a lab may point a rig at
its own file by path. Files are read with ``drivers.yamllimits.load_limited`` (safe types, size, depth and
alias limits) and validated; every problem
is a ``DialectError`` naming the file and key.

Templates are filled by ``fill()``: each ``{name}`` is replaced by a number formatted by
``format_number`` and nothing else. No Python format strings, no text from users.
"""
from __future__ import annotations

import math
import re
from decimal import Decimal
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, Mapping, Optional, Tuple

import yaml

from .errors import DriverError
from .yamllimits import YamlLimit, load_limited

DIALECT_DIR = Path(__file__).with_name("dialects")
_NAME = re.compile(r"^[a-z0-9][a-z0-9-]{0,63}$")
_PLACEHOLDER = re.compile(r"\{([a-z_][a-z0-9_]*)\}")
_TEMPLATE_OK = re.compile(r"^[\x20-\x7e]*$")


class DialectError(DriverError):
    """A dialect file is missing, malformed or inconsistent (a user mistake: exit 2)."""


def format_number(x: float) -> str:
    """SCPI decimal numeric program data (IEEE 488.2 §7.7.2 NRf, from memory): integers
    as NR1, others in the shortest form that round-trips, exponent as ``E``."""
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        raise TypeError(f"not a number: {x!r}")
    xf = float(x)
    if not math.isfinite(xf):
        raise ValueError(f"not a finite number: {x!r}")
    if xf == int(xf) and abs(xf) < 1e15:
        return str(int(xf))
    text = repr(xf)
    return text.replace("e", "E")


def placeholders(template: str) -> Tuple[str, ...]:
    return tuple(_PLACEHOLDER.findall(template))


def fill(template: str, **numbers: float) -> str:
    """Replace each ``{name}`` in ``template`` by ``format_number(numbers[name])``."""
    def sub(m):
        key = m.group(1)
        if key not in numbers:
            raise KeyError(f"template {template!r} needs a value for {key!r}")
        return format_number(numbers[key])
    return _PLACEHOLDER.sub(sub, template)


def quantize(x: float, step: float) -> float:
    """Round ``x`` to the nearest multiple of the setting resolution ``step``."""
    if not step or step <= 0:
        return float(x)
    n = round(float(x) / step)
    if abs(n) >= 1e15:
        return float(x)
    return float(Decimal(repr(float(step))) * n)   # 1001 x 0.1 is 100.1, not 100.10000000000001


# which placeholders each command template may (must) use
_SUPPLY_COMMANDS = {
    "clear_status": (), "event_status": (), "error_query": (),
    "set_voltage": ("volts",), "get_voltage": (), "set_current_limit": ("amps",),
    "get_current_limit": (), "set_ovp": ("volts",), "get_ovp": (), "output_on": (),
    "output_off": (), "get_output": (), "measure_voltage": (), "measure_current": (),
    "get_operation": (), "get_questionable": (), "set_comm_timeout": ("seconds",),
    "get_interlock": (),
}
_SUPPLY_OPTIONAL = {"set_comm_timeout", "get_interlock", "get_operation", "get_questionable"}
_AMMETER_COMMANDS = {
    "clear_status": (), "event_status": (), "error_query": (),
    "set_function": (), "get_function": (), "set_range": ("amps",), "get_range": (),
    "set_autorange": ("on",), "get_autorange": (), "set_nplc": ("nplc",), "get_nplc": (),
    "set_line_frequency": ("hz",), "get_line_frequency": (), "input_short_off": (),
    "get_input_short": (), "zero_correct_off": (), "get_zero_correct": (), "read": (),
}
_AMMETER_OPTIONAL = {"set_line_frequency", "get_line_frequency", "input_short_off",
                     "get_input_short", "zero_correct_off", "get_zero_correct"}
_GAUGE_COMMANDS = {"read": ()}
COMMANDS = {"supply": (_SUPPLY_COMMANDS, _SUPPLY_OPTIONAL),
            "ammeter": (_AMMETER_COMMANDS, _AMMETER_OPTIONAL),
            "gauge": (_GAUGE_COMMANDS, set())}
GAUGE_STATES = ("ok", "filament-off", "over-range", "under-range", "no-answer")
PRESSURE_UNITS_PA = {"Pa": 1.0, "hPa": 100.0, "mbar": 100.0,
                     "Torr": 101325.0 / 760.0}  # 1 Torr = 101325/760 Pa exactly (by definition)


@dataclass(frozen=True)
class Dialect:
    """A validated dialect. ``raw`` keeps the whole mapping for role-specific keys."""

    name: str
    role: str
    protocol: str
    source: str
    commands: Mapping[str, Optional[str]]
    sentinel: Optional[Tuple[str, str]]
    raw: Mapping[str, Any] = field(repr=False)

    def command(self, key: str, **numbers: float) -> str:
        tpl = self.commands.get(key)
        if tpl is None:
            raise DialectError(self.source, f"dialect has no {key!r} command")
        return fill(tpl, **numbers)

    def has(self, key: str) -> bool:
        return self.commands.get(key) is not None

    def get(self, dotted: str, default: Any = None) -> Any:
        """``get("output_off.threshold_v")``: a nested value or ``default``."""
        node: Any = self.raw
        for part in dotted.split("."):
            if not isinstance(node, Mapping) or part not in node:
                return default
            node = node[part]
        return node

    def number(self, dotted: str, default: Optional[float] = None) -> float:
        v = self.get(dotted, default)
        if v is None:
            raise DialectError(self.source, f"dialect has no {dotted!r}")
        return float(v)


def _find(name_or_path: str) -> Path:
    if _NAME.match(name_or_path):
        p = DIALECT_DIR / f"{name_or_path}.yaml"
        if p.is_file():
            return p
        known = ", ".join(sorted(x.stem for x in DIALECT_DIR.glob("*.yaml")))
        raise DialectError(name_or_path, f"no built-in dialect of that name (known: {known})")
    p = Path(name_or_path)
    if p.suffix not in (".yaml", ".yml") or not p.is_file():
        raise DialectError(name_or_path, "dialect must be a built-in name or an existing .yaml file")
    return p


def _num(problems, key, value, positive=True):
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        problems.append(f"{key}: expected a number, got {value!r}")
    elif positive and value <= 0:
        problems.append(f"{key}: must be positive, got {value!r}")


def validate(data: Any, source: str) -> Dialect:
    """Check a loaded mapping; raise one ``DialectError`` listing every problem."""
    problems = []
    if not isinstance(data, dict):
        raise DialectError(source, "dialect file must be a YAML mapping")
    role = data.get("role")
    if role not in COMMANDS:
        raise DialectError(source, f"role must be one of {sorted(COMMANDS)}, got {role!r}")
    name = data.get("name")
    if not isinstance(name, str) or not _NAME.match(name):
        problems.append(f"name: expected a lower-case name, got {name!r}")
    protocol = data.get("protocol")
    if protocol not in ("scpi", "ascii"):
        problems.append(f"protocol: 'scpi' or 'ascii', got {protocol!r}")
    allowed, optional = COMMANDS[role]
    cmds = data.get("commands")
    if not isinstance(cmds, dict):
        problems.append("commands: expected a mapping of command templates")
        cmds = {}
    for key in cmds:
        if key not in allowed:
            problems.append(f"commands.{key}: unknown command (allowed: {', '.join(allowed)})")
    commands: Dict[str, Optional[str]] = {}
    for key, want in allowed.items():
        tpl = cmds.get(key)
        if tpl is None:
            if key not in optional and not (role != "gauge" and protocol == "ascii"):
                problems.append(f"commands.{key}: required")
            commands[key] = None
            continue
        if not isinstance(tpl, str) or not tpl.strip() or not _TEMPLATE_OK.match(tpl):
            problems.append(f"commands.{key}: must be one line of printable ASCII")
            continue
        stripped = _PLACEHOLDER.sub("", tpl)
        if "{" in stripped or "}" in stripped:
            problems.append(f"commands.{key}: stray brace; placeholders look like {{name}}")
        got = placeholders(tpl)
        if sorted(set(got)) != sorted(want):
            problems.append(f"commands.{key}: placeholders {list(got)} but expected {list(want)}")
        commands[key] = tpl
    sentinel = data.get("sentinel")
    if sentinel is not None:
        if (not isinstance(sentinel, (list, tuple)) or len(sentinel) != 2
                or not all(isinstance(s, str) for s in sentinel)):
            problems.append("sentinel: [query, expected reply] or null")
            sentinel = None
        else:
            sentinel = (sentinel[0], sentinel[1])
    timing = data.get("timing") or {}
    _num(problems, "timing.worst_reply_s", timing.get("worst_reply_s"))
    if role == "supply":
        for key in ("limits.max_voltage_v", "limits.max_current_a", "resolution.voltage_v",
                    "resolution.current_a", "readback.voltage_abs_v", "readback.current_abs_a",
                    "output_off.threshold_v", "output_off.bleed_down_s", "output_off.poll_s"):
            a, b = key.split(".")
            _num(problems, key, (data.get(a) or {}).get(b))
        _num(problems, "readback.rel", (data.get("readback") or {}).get("rel"), positive=False)
        ct = data.get("comm_timeout") or {}
        if bool(ct.get("supported")) != (commands.get("set_comm_timeout") is not None):
            problems.append("comm_timeout.supported must match whether commands.set_comm_timeout is set")
        for flag, spec in (data.get("status") or {}).items():
            if flag not in ("cc", "tripped", "interlock_open"):
                problems.append(f"status.{flag}: unknown flag (cc, tripped, interlock_open)")
                continue
            if spec is None:
                continue
            bits = spec.get("bits", [spec.get("bit")]) if isinstance(spec, dict) else None
            if (not isinstance(spec, dict) or spec.get("register") not in ("operation", "questionable")
                    or not isinstance(bits, list) or not bits
                    or not all(isinstance(b, int) and not isinstance(b, bool) and 0 <= b <= 15
                               for b in bits)):
                problems.append(f"status.{flag}: {{register: operation|questionable, "
                                f"bit: 0..15}} or {{register: ..., bits: [..]}}")
    elif role == "ammeter":
        ranges = data.get("ranges_a")
        if not isinstance(ranges, list) or not ranges:
            problems.append("ranges_a: a list of full-scale ranges in A")
        else:
            for i, r in enumerate(ranges):
                _num(problems, f"ranges_a[{i}]", r)
        nplc = data.get("nplc") or {}
        _num(problems, "nplc.min", nplc.get("min"))
        _num(problems, "nplc.max", nplc.get("max"))
        _num(problems, "timing.overhead_s", timing.get("overhead_s"), positive=False)
        if not isinstance(data.get("function_replies"), list):
            problems.append("function_replies: list of accepted answers to get_function")
    elif role == "gauge":
        reply = data.get("reply") or {}
        pat = reply.get("pattern")
        try:
            rx = re.compile(pat) if isinstance(pat, str) else None
        except re.error as exc:
            rx = None
            problems.append(f"reply.pattern: not a regular expression ({exc})")
        if rx is not None and not {"status", "value"} <= set(rx.groupindex):
            problems.append("reply.pattern: needs named groups (?P<status>...) and (?P<value>...)")
        if rx is None and isinstance(pat, str) is False:
            problems.append("reply.pattern: required")
        states = reply.get("states")
        if not isinstance(states, dict) or not states:
            problems.append("reply.states: mapping of status code to state")
        else:
            for code, st in states.items():
                if st not in GAUGE_STATES:
                    problems.append(f"reply.states.{code}: {st!r} is not one of {GAUGE_STATES}")
        if data.get("unit") not in PRESSURE_UNITS_PA:
            problems.append(f"unit: one of {sorted(PRESSURE_UNITS_PA)}")
    cap = data.get("error_queue_cap", 32)
    if not isinstance(cap, int) or isinstance(cap, bool) or not 1 <= cap <= 1000:
        problems.append("error_queue_cap: integer 1..1000")
    if problems:
        raise DialectError(source, "; ".join(problems))
    return Dialect(name=name, role=role, protocol=protocol, source=source,
                   commands=commands, sentinel=sentinel, raw=data)


_CACHE: Dict[str, Dialect] = {}


def load_dialect(name_or_path: str, role: Optional[str] = None) -> Dialect:
    """Load and validate a dialect by built-in name or file path (cached per path)."""
    if isinstance(name_or_path, Dialect):
        d = name_or_path
    else:
        path = _find(str(name_or_path))
        key = str(path.resolve())
        d = _CACHE.get(key)
        if d is None:
            try:
                data = load_limited(path.read_text(encoding="utf-8"))
            except YamlLimit as exc:
                raise DialectError(str(path), exc.message) from None
            except (OSError, UnicodeDecodeError) as exc:
                raise DialectError(str(path), f"cannot read: {exc}") from None
            except yaml.YAMLError as exc:
                mark = getattr(exc, "problem_mark", None)
                where = f"{path}:{mark.line + 1}:{mark.column + 1}" if mark else str(path)
                raise DialectError(where, f"not valid YAML: {getattr(exc, 'problem', exc)}") from None
            d = validate(data, str(path))
            _CACHE[key] = d
    if role is not None and d.role != role:
        raise DialectError(d.source, f"dialect is for a {d.role}, not a {role}")
    return d


DEFAULT_DIALECTS = {"supply": "generic-scpi-supply", "ammeter": "generic-scpi-picoammeter",
                    "gauge": "generic-ascii-gauge"}
