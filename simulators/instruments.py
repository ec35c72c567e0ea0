"""Simulated instruments: a high-voltage supply, a picoammeter, a vacuum gauge and a set
of interlock lines, as command interpreters (``drivers.transport.CommandInterpreter``).

They share one ``Clock`` with the simulated cathode. Each one, before it looks at a
command, asks its stand to bring the physics up to ``clock.now()`` (lazy advance), so
nothing depends on wall time unless the clock is a wall clock.

Command sets, status bits and the gauge's own serial protocol are listed in
``docs/dev-siminst.md``. Every ``*IDN?`` answers ``FIELDRUN,SIM-<ROLE>,<serial>,
SIMULATED-<version>`` so nobody mistakes a simulated instrument for a real one.

Behaviour modelled on real instruments (common practice, no source, unless named):

* supply: the output slews up at a finite rate, falls through its bleeder and output
  capacitance (tau = R_bleed * C) when lowered or switched off, goes into constant-current
  mode at its current limit, trips (output off, latched until ``OUTP:PROT:CLE``) on
  over-voltage, on over-current when the over-current trip is enabled, on its interlock
  input and on its communication timeout when armed. By default it KEEPS ITS OUTPUT ON
  when the host goes away, as nearly every real supply does.
* ammeter: decade ranges 2 nA ... 20 mA with 5 % over-range, auto-range that costs a
  delay per range step and answers the overload value +9.9E37 (-9.9E37 for negative
  current) on the reading where it ranges up (SCPI-99 vol. 1, 7.2.1.5 for the special
  values, from memory), an integration time of NPLC / line frequency that advances the
  clock, and an input that is shorted (zero check on) after ``*RST`` until configured.
* gauge: a first-order lag on the chamber pressure, an under- and over-range, a filament
  that can be off and that switches itself off above its protection pressure.
* interlock lines: modem-line style (DTR/RTS driven by the host, CTS/DSR/CD read by it):
  the external chain, an inhibit output and a heartbeat output feeding a hardware
  watchdog relay in series with the supply's interlock input.
"""
from __future__ import annotations

import difflib
import math
import threading
import zlib
from typing import Any, Callable, Dict, List, Mapping, Optional

import numpy as np

from . import scpi
from .quirks import Quirks
from .scpi import Command, Header, ScpiError, nr3, parse_bool, parse_number

try:  # the package version, for the firmware field of *IDN?
    from sequencer import __version__ as _VERSION
except Exception:  # pragma: no cover - only when sequencer is not importable
    _VERSION = "0"

FIRMWARE = f"SIMULATED-{_VERSION}"
MAKER = "FIELDRUN"

# Overload and not-a-number values (SCPI-99 vol. 1, 7.2.1.5: +INF 9.9E37, -INF -9.9E37,
# NAN 9.91E37), from memory.
OVERLOAD = 9.9e37
NOT_A_NUMBER = 9.91e37

# Questionable status bits of the simulated supply (our layout; bits 0 and 1 follow the
# SCPI-99 vol. 1, 9.4 naming VOLTage and CURRent, from memory).
QUES_OVP = 1 << 0        # over-voltage protection tripped
QUES_CC = 1 << 1         # in constant-current mode (voltage not regulated)
QUES_OCP = 1 << 9        # over-current / arc trip
QUES_INTERLOCK = 1 << 10  # output disabled by the interlock input (chain, inhibit, relay)
QUES_COMM = 1 << 11      # output disabled by the communication timeout
# Operation status bits (our layout)
OPER_CV = 1 << 8
OPER_CC = 1 << 10
OPER_ON = 1 << 11

TRIP_BITS = {"ovp": QUES_OVP, "ocp": QUES_OCP, "interlock": QUES_INTERLOCK,
             "comm-timeout": QUES_COMM}


def _crc(text: str) -> int:
    return zlib.crc32(text.encode())


def _rng(seed: int, name: str) -> np.random.Generator:
    return np.random.default_rng([int(seed) & 0xFFFFFFFF, _crc(name)])


def check_keys(where: str, given: Mapping[str, Any], known) -> None:
    """Refuse settings nobody reads (a typo would otherwise pass silently)."""
    unknown = sorted(set(given) - set(known))
    if unknown:
        close = difflib.get_close_matches(unknown[0], sorted(known), n=1)
        hint = f" (did you mean '{close[0]}'?)" if close else f" (known: {', '.join(sorted(known))})"
        raise ValueError(f"{where}: unknown setting '{unknown[0]}'{hint}")


class SimInstrument:
    """Common machinery: per-command quirk bookkeeping, lazy physics sync, reply delay.

    Subclasses implement ``_execute(line) -> reply or None``.
    """

    ROLE = "instrument"
    MODEL = "SIM-INSTRUMENT"
    #: the settings this instrument takes under ``simulation: <role>:``
    KEYS: frozenset = frozenset()

    def __init__(self, clock, config: Optional[Mapping[str, Any]] = None,
                 quirks: Optional[Quirks] = None, seed: int = 0,
                 sync: Optional[Callable[[float], None]] = None,
                 lock: Optional[threading.RLock] = None):
        self.clock = clock
        self.config = dict(config or {})
        check_keys(f"simulation.{self.ROLE}", self.config, self.KEYS | {"serial", "model"})
        self.seed = int(seed)
        self.quirks = quirks if quirks is not None else Quirks(self.ROLE, None, seed)
        self.quirks.origin = clock.now()      # fault schedules count from here
        self.serial = str(self.config.get("serial", f"SIM-{self.ROLE[:3].upper()}-{self.seed % 100000:05d}"))
        self.model = str(self.config.get("model", self.MODEL))
        self._sync = sync
        self._lock = lock if lock is not None else threading.RLock()
        self._last: Optional[tuple] = None      # (n, t, line) of the last command
        self._last_taken = True
        self._extra_delay = 0.0                 # instrument time spent (wall clocks)
        self._wire_delay = 0.0                  # reply transmission time
        self._replied = False
        self.connected = True
        self.disconnects = 0

    # -- CommandInterpreter API
    def handle(self, line: str) -> Optional[str]:
        with self._lock:
            line = line.strip()
            t = self.clock.now()
            n = self.quirks.tick(t, line)
            self.connected = True
            self._extra_delay = 0.0
            self._wire_delay = 0.0
            self._replied = False
            self._last, self._last_taken = (n, t, line), False
            self.sync(t)
            if self.quirks.hit("drop-connection"):
                raise ConnectionResetError(f"simulated {self.ROLE} dropped the connection")
            if self.quirks.hit("hang"):
                return None
            self._on_command(t)
            if self.quirks.hit("error-flood"):
                self._flood_error()
            reply = self._execute(line)
            if self.quirks.hit("never-answer"):
                return None
            if reply is None:
                return None
            reply = self.quirks.shape_reply(reply)
            self._wire_delay = self.transmission_s(reply)
            self._replied = True
            return reply

    def reply_delay(self, line: str) -> float:
        """Latency of the reply to ``line`` in seconds of this instrument's clock:
        the quirk latency plus, on a wall clock, the time the instrument spent (range
        changes, integration). ``math.inf`` for a reply that never comes. Asked after
        ``handle(line)`` it describes that command; asked before, the next one."""
        with self._lock:
            line = line.strip()
            if self._last is not None and not self._last_taken and self._last[2] == line:
                n, t, _ = self._last
                self._last_taken = True
                extra = self._extra_delay + self._wire_delay
                answers = self._replied or "?" in line
            else:
                n, t, extra = self.quirks.n + 1, self.clock.now(), 0.0
                answers = "?" in line
            return self.quirks.reply_delay(n, t, line, answers) + extra

    def disconnect(self) -> None:
        """The host went away (socket closed, process gone)."""
        with self._lock:
            self.connected = False
            self.disconnects += 1
            self._on_disconnect(self.clock.now())

    # -- helpers for subclasses
    def sync(self, t: Optional[float] = None) -> None:
        if self._sync is not None:
            self._sync(self.clock.now() if t is None else t)

    def spend(self, dt: float) -> None:
        """The instrument is busy for ``dt`` seconds: a virtual clock moves on at once
        (the physics follows); on a wall clock the time is added to the reply delay."""
        if dt <= 0:
            return
        if getattr(self.clock, "simulated", False) and hasattr(self.clock, "advance"):
            self.clock.advance(dt)
            self.sync()
        else:
            self._extra_delay += dt

    def transmission_s(self, reply: str) -> float:
        """Time the reply takes on the wire (0 here; a serial instrument overrides)."""
        return 0.0

    def identity(self) -> str:
        """IEEE 488.2 10.14: maker, model, serial, firmware."""
        return f"{MAKER},{self.model},{self.serial},{FIRMWARE}"

    def _on_command(self, t: float) -> None:
        pass

    def _on_disconnect(self, t: float) -> None:
        pass

    def _flood_error(self) -> None:
        pass

    def _execute(self, line: str) -> Optional[str]:  # pragma: no cover - abstract
        raise NotImplementedError


class ScpiInstrument(SimInstrument):
    """An instrument speaking IEEE 488.2 common commands and a SCPI command tree."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.errors = scpi.ErrorQueue(self.quirks.error_queue_length)
        self.esr = scpi.ESR_PON   # IEEE 488.2 11.5.1: power-on bit set at power-up
        self.ese = 0
        self.sre = 0
        self.ques_event = 0
        self.ques_enable = 0
        self.oper_event = 0
        self.oper_enable = 0
        self._table: List[Command] = [Command(Header(p), s, g) for p, s, g in self._commands()]
        self._table += [Command(Header(p), s, g) for p, s, g in self._status_commands()]
        self._cache: Dict[tuple, Optional[Command]] = {}

    # -- to be extended
    def _commands(self):
        return []

    def _reset(self) -> None:
        """``*RST`` (IEEE 488.2 10.32): the instrument's defined reset state."""

    def ques_condition(self) -> int:
        return 0

    def oper_condition(self) -> int:
        return 0

    # -- errors and status
    def error(self, code: int, detail: str = "") -> None:
        self.errors.push(code, detail)
        self.esr |= scpi.esr_bit_for(code)

    def _flood_error(self) -> None:
        self.error(-300, "simulated error flood")

    def _latch_status(self) -> None:
        self.ques_event |= self.ques_condition()
        self.oper_event |= self.oper_condition()

    def status_byte(self) -> int:
        self._latch_status()
        stb = 0
        if len(self.errors):
            stb |= scpi.STB_EAV
        if self.ques_event & self.ques_enable:
            stb |= scpi.STB_QUES
        if self.esr & self.ese:
            stb |= scpi.STB_ESB
        if self.oper_event & self.oper_enable:
            stb |= scpi.STB_OPER
        if stb & self.sre & ~scpi.STB_MSS:
            stb |= scpi.STB_MSS
        return stb

    def _status_commands(self):
        def ques_event(_):
            self._latch_status()
            v, self.ques_event = self.ques_event, 0
            return str(v)

        def oper_event(_):
            self._latch_status()
            v, self.oper_event = self.oper_event, 0
            return str(v)

        def set_int(attr):
            def setter(arg):
                setattr(self, attr, int(parse_number(arg, lo=0, hi=65535)) & 0xFFFF)
            return setter

        def preset(_):
            self.ques_enable = self.oper_enable = 0

        return [
            ("STATus:QUEStionable[:EVENt]", None, ques_event),
            ("STATus:QUEStionable:CONDition", None, lambda _: str(self.ques_condition())),
            ("STATus:QUEStionable:ENABle", set_int("ques_enable"), lambda _: str(self.ques_enable)),
            ("STATus:OPERation[:EVENt]", None, oper_event),
            ("STATus:OPERation:CONDition", None, lambda _: str(self.oper_condition())),
            ("STATus:OPERation:ENABle", set_int("oper_enable"), lambda _: str(self.oper_enable)),
            ("STATus:PRESet", preset, None),
            ("SYSTem:ERRor[:NEXT]", None, self._syst_err),
            ("SYSTem:ERRor:COUNt", None, lambda _: str(len(self.errors))),
            ("SYSTem:VERSion", None, lambda _: "1999.0"),
        ]

    def _syst_err(self, _arg: str) -> str:
        if self.quirks.hit("never-empty-errors"):
            return scpi.format_error(-300, "Device-specific error; simulated stuck queue")
        return scpi.format_error(*self.errors.pop())

    # -- dispatch
    def _lookup(self, tokens: List[str]) -> Optional[Command]:
        key = tuple(tokens)
        if key not in self._cache:
            self._cache[key] = next((c for c in self._table if c.header.matches(tokens)), None)
        return self._cache[key]

    def _common(self, head: str, arg: str, query: bool) -> Optional[str]:
        if head == "*IDN" and query:
            return self.identity()
        if head == "*CLS" and not query:
            # IEEE 488.2 10.3: clears the event registers and the error queue
            self.errors.clear()
            self.esr = 0
            self.ques_event = self.oper_event = 0
            return None
        if head == "*ESR" and query:
            v, self.esr = self.esr, 0
            return str(v)
        if head == "*ESE":
            if query:
                return str(self.ese)
            self.ese = int(parse_number(arg, lo=0, hi=255)) & 0xFF
            return None
        if head == "*SRE":
            if query:
                return str(self.sre)
            self.sre = int(parse_number(arg, lo=0, hi=255)) & 0xBF
            return None
        if head == "*STB" and query:
            return str(self.status_byte())
        if head == "*OPC":
            # every command here completes before the next is read, so *OPC? answers 1
            # at once and *OPC sets the OPC bit at once (IEEE 488.2 10.18/10.19, from memory)
            if query:
                return "1"
            self.esr |= scpi.ESR_OPC
            return None
        if head == "*RST" and not query:
            self._reset()
            return None
        if head == "*TST" and query:
            return "0"
        if head == "*WAI" and not query:
            return None
        raise ScpiError(-113, head + ("?" if query else ""))

    def _execute(self, line: str) -> Optional[str]:
        replies = []
        for unit in scpi.split_units(line):
            try:
                common, tokens, arg, query = scpi.parse_unit(unit)
                if common:
                    r = self._common(tokens[0], arg, query)
                else:
                    cmd = self._lookup(tokens)
                    fn = None if cmd is None else (cmd.getter if query else cmd.setter)
                    if fn is None:
                        raise ScpiError(-113, unit[:24])
                    r = fn(arg)
                if r is not None:
                    replies.append(r)
            except ScpiError as exc:
                self.error(exc.code, exc.detail)
        self._latch_status()
        return ";".join(replies) if replies else None


# ===================================================================== supply


class SimSupply(ScpiInstrument):
    """High-voltage DC supply. Settings (``simulation: supply:`` in the rig file):

    ``v_max`` (V, 5000), ``i_max`` (A, 1e-3), ``slew_v_per_s`` (1000), ``capacitance_f``
    (2e-9) and ``bleeder_ohm`` (1e8): tau = 0.2 s, ``host_loss`` (``keep``|``off``),
    ``v_noise`` (V rms of MEAS:VOLT?, 0.02), ``i_noise_a`` (A rms of MEAS:CURR?, 1e-9),
    ``serial``, ``model``.
    """

    ROLE = "supply"
    MODEL = "SIM-SUPPLY"
    KEYS = frozenset({"v_max", "i_max", "slew_v_per_s", "capacitance_f", "bleeder_ohm", "host_loss",
                      "v_noise", "i_noise_a"})

    def __init__(self, clock, config=None, quirks=None, seed=0, sync=None, lock=None):
        super().__init__(clock, config, quirks, seed, sync, lock)
        c = self.config
        self.v_max = float(c.get("v_max", 5000.0))
        self.i_max = float(c.get("i_max", 1e-3))
        self.slew = float(c.get("slew_v_per_s", 1000.0))
        self.tau = float(c.get("capacitance_f", 2e-9)) * float(c.get("bleeder_ohm", 1e8))
        self.host_loss = str(c.get("host_loss", "keep"))
        if self.host_loss not in ("keep", "off"):
            raise ValueError("simulation.supply.host_loss must be 'keep' or 'off'")
        self.v_noise = float(c.get("v_noise", 0.02))
        self.i_noise = float(c.get("i_noise_a", 1e-9))
        self._noise = _rng(seed, "supply-readback")
        self.t_last = clock.now()
        self.t_command = self.t_last
        self.v_out = 0.0            # truth: terminal voltage
        self.i_out = 0.0            # truth: load current (set by the stand)
        self.cc = False
        self.events: List[tuple] = []   # (t, kind, detail)
        #: callables ``(t0, t1) -> Optional[(t, reason)]``: earliest forced-off moment
        self.inhibitors: List[Callable[[float, float], Optional[tuple]]] = []
        self._power_on_state()

    def _power_on_state(self) -> None:
        self.v_set = 0.0
        self.i_limit = self.i_max
        self.ovp = self.v_max
        self.ocp = False
        self.output = False
        self.trip: Optional[str] = None
        self.comm_timeout = 0.0

    def _reset(self) -> None:
        self.evolve(self.clock.now())
        if self.output:
            self._set_output(False, self.clock.now(), "reset")
        self._power_on_state()

    # -- dynamics
    def _target(self, t: float) -> float:
        target = self.v_set
        drift = self.quirks.active_at("drift", t)
        if drift is not None:
            t0 = self.quirks.origin + (drift.from_s if drift.from_s is not None else 0.0)
            rate = float(drift.option("rate_v_per_s", 0.5))
            cap = float(drift.option("max_v", 50.0))
            d = rate * max(0.0, t - t0)
            target += math.copysign(min(abs(d), cap), d)
        return max(0.0, target)

    def cv_target(self, t: float) -> float:
        """What the voltage loop aims at (setpoint, plus drift when that quirk acts)."""
        return self._target(t) if self.output else 0.0

    def _relax(self, dt: float, t_end: float) -> None:
        """Move the terminal voltage over ``dt`` ending at ``t_end``."""
        if dt <= 0:
            return
        target = self._target(t_end) if (self.output and not self.cc) else 0.0
        if self.output and self.cc:
            target = self.v_out   # the current loop holds the voltage (the stand sets it)
        if self.v_out < target:
            v_next = min(target, self.v_out + self.slew * dt)
            if self.output and v_next > self.ovp >= self.v_out:
                # the output crosses the over-voltage limit part-way through the step
                dt_cross = (self.ovp - self.v_out) / self.slew
                self.v_out = self.ovp
                self._set_output(False, t_end - dt + dt_cross, "ovp")
                self.v_out *= math.exp(-(dt - dt_cross) / self.tau)
                return
            self.v_out = v_next
        else:
            # no active sink: the output falls through the bleeder (exponential)
            self.v_out = target + (self.v_out - target) * math.exp(-dt / self.tau)
        if self.output and self.v_out > self.ovp:
            self._set_output(False, t_end, "ovp")

    def evolve(self, t: float) -> None:
        """Bring the output to time ``t``, applying forced-off events on the way."""
        while t > self.t_last:
            t0 = self.t_last
            te, reason = t, None
            if self.output:
                if self.comm_timeout > 0 and self.quirks.active_at("ignore-comm-timeout", t) is None:
                    deadline = self.t_command + self.comm_timeout
                    if deadline <= t:
                        te, reason = max(t0, deadline), "comm-timeout"
                for inh in self.inhibitors:
                    hit = inh(t0, te)
                    if hit is not None and hit[0] <= te:
                        te, reason = max(t0, hit[0]), hit[1]
            self._relax(te - t0, te)
            self.t_last = te
            if reason is not None and self.output:
                self._set_output(False, te, reason)
            if te >= t:
                break
        if not self.output:
            self.cc = False

    def blocked(self, t: float) -> Optional[str]:
        """Why the interlock input refuses the output at ``t`` (None if it allows)."""
        for inh in self.inhibitors:
            hit = inh(t, t)
            if hit is not None:
                return hit[1]
        return None

    def _set_output(self, on: bool, t: float, why: str) -> None:
        self.output = on
        if not on:
            self.cc = False
        if why in TRIP_BITS:
            self.trip = why
        self.events.append((t, "output-on" if on else "output-off", why))

    def enter_cc(self, v_cc: float, t: float) -> None:
        """Called by the stand when the load would draw more than the current limit:
        the current loop holds the output at ``v_cc``."""
        self.v_out = max(0.0, v_cc)
        if not self.cc:
            self.events.append((t, "cc", f"{self.i_limit:.3g} A"))
        self.cc = True
        if self.ocp:
            self._set_output(False, t, "ocp")

    def leave_cc(self) -> None:
        self.cc = False

    # -- command bookkeeping
    def _on_command(self, t: float) -> None:
        if t > self.t_last:
            self.evolve(t)
        self.t_command = t

    def _on_disconnect(self, t: float) -> None:
        self.evolve(t)
        self.events.append((t, "host-lost", self.host_loss))
        if self.host_loss == "off" and self.output:
            self._set_output(False, t, "host-lost")

    def ques_condition(self) -> int:
        bits = TRIP_BITS.get(self.trip or "", 0)
        if self.cc:
            bits |= QUES_CC
        if self.blocked(self.clock.now()):
            bits |= QUES_INTERLOCK
        return bits

    def oper_condition(self) -> int:
        if not self.output:
            return 0
        return OPER_ON | (OPER_CC if self.cc else OPER_CV)

    # -- commands
    def _commands(self):
        return [
            ("[SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude]", self._set_volt,
             lambda _: nr3(self.v_set)),
            ("[SOURce:]CURRent[:LEVel][:IMMediate][:AMPLitude]", self._set_curr,
             lambda _: nr3(self.i_limit)),
            ("[SOURce:]VOLTage:PROTection[:LEVel]", self._set_ovp, lambda _: nr3(self.ovp)),
            ("[SOURce:]VOLTage:PROTection:TRIPped", None,
             lambda _: "1" if self.trip == "ovp" else "0"),
            ("[SOURce:]CURRent:PROTection:STATe", self._set_ocp,
             lambda _: "1" if self.ocp else "0"),
            ("[SOURce:]CURRent:PROTection:TRIPped", None,
             lambda _: "1" if self.trip == "ocp" else "0"),
            ("[SOURce:]VOLTage:SLEW", self._set_slew, lambda _: nr3(self.slew)),
            ("OUTPut[:STATe]", self._set_outp, self._get_outp),
            ("OUTPut:PROTection:CLEar", self._clear_trip, None),
            ("OUTPut:PROTection:TRIPped", None, lambda _: "1" if self.trip else "0"),
            ("OUTPut:MODE", None, self._get_mode),
            ("MEASure[:SCALar]:VOLTage[:DC]", None, self._meas_volt),
            ("MEASure[:SCALar]:CURRent[:DC]", None, self._meas_curr),
            ("SYSTem:COMMunicate:TIMeout", self._set_comm_timeout, lambda _: nr3(self.comm_timeout)),
            ("SYSTem:INTerlock", None, lambda _: "0" if self.blocked(self.clock.now()) else "1"),
        ]

    def _set_volt(self, arg: str) -> None:
        v = parse_number(arg, "V", lo=0.0, hi=self.v_max, default=0.0)
        if not 0.0 <= v <= self.v_max:
            raise ScpiError(-222, f"{v:g} V")
        self.v_set = v

    def _set_curr(self, arg: str) -> None:
        a = parse_number(arg, "A", lo=0.0, hi=self.i_max, default=self.i_max)
        if not 0.0 <= a <= self.i_max:
            raise ScpiError(-222, f"{a:g} A")
        self.i_limit = a

    def _set_ovp(self, arg: str) -> None:
        v = parse_number(arg, "V", lo=0.0, hi=self.v_max, default=self.v_max)
        if not 0.0 <= v <= self.v_max:
            raise ScpiError(-222, f"{v:g} V")
        self.ovp = v

    def _set_ocp(self, arg: str) -> None:
        self.ocp = parse_bool(arg)

    def _set_slew(self, arg: str) -> None:
        s = parse_number(arg, "", lo=1.0, hi=1e5, default=1000.0)
        if s <= 0:
            raise ScpiError(-222)
        self.slew = s

    def _set_comm_timeout(self, arg: str) -> None:
        s = parse_number(arg, "S", lo=0.0, hi=3600.0, default=0.0)
        if not 0.0 <= s <= 3600.0:
            raise ScpiError(-222, f"{s:g} s")
        self.comm_timeout = s

    def _set_outp(self, arg: str) -> None:
        on = parse_bool(arg)
        t = self.clock.now()
        if on:
            if self.trip:
                raise ScpiError(-221, f"protection tripped ({self.trip}); send OUTP:PROT:CLE")
            why = self.blocked(t)
            if why:
                raise ScpiError(-221, f"interlock open ({why})")
            if not self.output:
                self._set_output(True, t, "command")
            return
        if self.output:
            f = self.quirks.hit("ignore-output-off")
            if f is not None:
                self.events.append((t, "ignored-output-off", "quirk"))
                self._lying_off = bool(f.option("lie", False))
                return
            self._set_output(False, t, "command")

    _lying_off = False

    def _get_outp(self, _arg: str) -> str:
        if self.output and self._lying_off and self.quirks.find("ignore-output-off"):
            return "0"
        return "1" if self.output else "0"

    def _get_mode(self, _arg: str) -> str:
        if not self.output:
            return "OFF"
        return "CC" if self.cc else "CV"

    def _clear_trip(self, _arg: str) -> None:
        if self.trip == "interlock" and self.blocked(self.clock.now()):
            raise ScpiError(-221, "interlock still open")
        self.trip = None

    def _meas_volt(self, _arg: str) -> str:
        return nr3(max(0.0, self.v_out + self.v_noise * self._noise.standard_normal()))

    def _meas_curr(self, _arg: str) -> str:
        i = self.i_out if self.v_out > 0 else 0.0
        return nr3(i + self.i_noise * self._noise.standard_normal())


# ===================================================================== ammeter

RANGES_A = (2e-9, 2e-8, 2e-7, 2e-6, 2e-5, 2e-4, 2e-3, 2e-2)   # 2 nA ... 20 mA
OVER_RANGE = 1.05   # 5 % over-range before overload (common practice, no source)


class SimAmmeter(ScpiInstrument):
    """Picoammeter. Settings (``simulation: ammeter:``): ``polarity`` (+1/-1: sign of the
    reading for positive emission, set by how the ammeter sits in the circuit),
    ``noise_frac`` (rms noise as a fraction of the range, 2e-5), ``offset_frac`` (input
    offset, fraction of range, 5e-5, removed by zero correction), ``autorange_delay_s``
    (per range step, 0.02), ``autorange_glitch`` (true: the reading that makes it range
    up is the overload value; false: it measures again on the new range), ``serial``,
    ``model``.
    """

    ROLE = "ammeter"
    MODEL = "SIM-AMMETER"
    KEYS = frozenset({"polarity", "noise_frac", "offset_frac", "autorange_delay_s",
                      "autorange_glitch"})

    def __init__(self, clock, config=None, quirks=None, seed=0, sync=None, lock=None,
                 current: Optional[Callable[[], float]] = None):
        super().__init__(clock, config, quirks, seed, sync, lock)
        c = self.config
        self.polarity = -1.0 if float(c.get("polarity", 1)) < 0 else 1.0
        self.noise_frac = float(c.get("noise_frac", 2e-5))
        self.offset_frac = float(c.get("offset_frac", 5e-5))
        self.autorange_delay = float(c.get("autorange_delay_s", 0.02))
        self.autorange_glitch = bool(c.get("autorange_glitch", True))
        self._current = current or (lambda: 0.0)
        self._noise = _rng(seed, "ammeter-noise")
        self.range_changes: List[tuple] = []   # (t, old, new)
        self._reset()

    def _reset(self) -> None:
        self.function = "CURR"
        self.range_index = len(RANGES_A) - 1
        self.auto = True
        self.nplc = 1.0
        self.line_hz = 50.0
        self.zero_check = True     # input shorted after *RST until configured
        self.zero_correct = False
        self.zero_offset: Dict[int, float] = {}
        self.count = 1
        self.last: Optional[str] = None

    @property
    def range_a(self) -> float:
        return RANGES_A[self.range_index]

    def _commands(self):
        return [
            ("CONFigure[:SCALar][:CURRent][:DC]", self._configure, lambda _: '"CURR:DC"'),
            ("[SENSe:]FUNCtion[:ON]", self._set_function, lambda _: f'"{self.function}:DC"'),
            ("[SENSe:]CURRent[:DC]:RANGe[:UPPer]", self._set_range, lambda _: nr3(self.range_a)),
            ("[SENSe:]CURRent[:DC]:RANGe:AUTO", self._set_auto, lambda _: "1" if self.auto else "0"),
            ("[SENSe:]CURRent[:DC]:NPLCycles", self._set_nplc, lambda _: nr3(self.nplc)),
            ("SYSTem:LFRequency", self._set_lfr, lambda _: str(int(self.line_hz))),
            # input short ("zero check"): both header families are accepted
            ("SYSTem:ZCHeck[:STATe]", self._set_zch, self._get_zch),
            ("INPut:SHORt[:STATe]", self._set_zch, self._get_zch),
            ("SYSTem:ZCORrect[:STATe]", self._set_zcor, lambda _: "1" if self.zero_correct else "0"),
            ("[SENSe:]CORRection[:STATe]", self._set_zcor, lambda _: "1" if self.zero_correct else "0"),
            ("SYSTem:ZCORrect:ACQuire", self._acquire_zero, None),
            ("TRIGger:COUNt", self._set_count, lambda _: str(self.count)),
            ("INITiate[:IMMediate]", lambda _: self._measure(), None),
            ("READ", None, lambda _: self._measure()),
            ("FETCh", None, self._fetch),
            ("MEASure[:SCALar][:CURRent][:DC]", None, self._meas),
        ]

    def _configure(self, arg: str) -> None:
        self.function = "CURR"
        a = arg.strip().upper()
        if a in ("", "AUTO", "DEF", "DEFAULT"):
            self.auto = True
        else:
            self._set_range(arg)
        self.count = 1
        self._unshort()

    def _unshort(self) -> None:
        if self.quirks.hit("left-shorted"):
            return
        self.zero_check = False

    def _set_function(self, arg: str) -> None:
        if arg.strip().strip("'\"").upper() not in ("CURR", "CURRENT", "CURR:DC", "CURRENT:DC"):
            raise ScpiError(-224, arg.strip()[:20])
        self.function = "CURR"

    def _set_range(self, arg: str) -> None:
        a = abs(parse_number(arg, "A", lo=RANGES_A[0], hi=RANGES_A[-1], default=RANGES_A[-1]))
        if a > RANGES_A[-1] * OVER_RANGE:
            raise ScpiError(-222, f"{a:g} A")
        self.range_index = next(i for i, r in enumerate(RANGES_A) if a <= r * OVER_RANGE)
        self.auto = False

    def _set_auto(self, arg: str) -> None:
        self.auto = parse_bool(arg)

    def _set_nplc(self, arg: str) -> None:
        n = parse_number(arg, "", lo=0.01, hi=60.0, default=1.0)
        if not 0.01 <= n <= 60.0:
            raise ScpiError(-222, f"{n:g}")
        self.nplc = n

    def _set_lfr(self, arg: str) -> None:
        hz = parse_number(arg, "HZ")
        if hz not in (50.0, 60.0):
            raise ScpiError(-224, f"{hz:g} Hz")
        self.line_hz = hz

    def _set_zch(self, arg: str) -> None:
        if parse_bool(arg):
            self.zero_check = True
        else:
            self._unshort()

    def _get_zch(self, _arg: str) -> str:
        f = self.quirks.find("left-shorted")
        if f is not None and f.option("lie", False):
            return "0"
        return "1" if self.zero_check else "0"

    def _set_zcor(self, arg: str) -> None:
        self.zero_correct = parse_bool(arg)

    def _acquire_zero(self, _arg: str) -> None:
        # the offset of the present range, measured with the input shorted
        self.zero_offset[self.range_index] = self.offset_frac * self.range_a

    def _set_count(self, arg: str) -> None:
        n = parse_number(arg, "", lo=1, hi=1000, default=1)
        if not 1 <= n <= 1000:
            raise ScpiError(-222, f"{n:g}")
        self.count = int(n)

    @property
    def integration_s(self) -> float:
        return self.nplc / self.line_hz

    def _one_reading(self) -> float:
        """One integrated reading at the current time (after the integration)."""
        self.spend(self.integration_s)
        true_i = 0.0 if self.zero_check else self.polarity * float(self._current())
        r = self.range_a
        value = true_i + self.offset_frac * r + self.noise_frac * r * self._noise.standard_normal()
        if self.zero_correct:
            value -= self.zero_offset.get(self.range_index, 0.0)
        if abs(value) > r * OVER_RANGE:
            if self.auto and self.range_index < len(RANGES_A) - 1:
                new = next((i for i, x in enumerate(RANGES_A) if abs(value) <= x * OVER_RANGE),
                           len(RANGES_A) - 1)
                self._change_range(new)
                if not self.autorange_glitch:      # measure again on the new range
                    return self._one_reading()
            return math.copysign(OVERLOAD, value)
        if self.auto and self.range_index > 0 and abs(value) < 0.9 * RANGES_A[self.range_index - 1]:
            new = next(i for i, x in enumerate(RANGES_A) if abs(value) < 0.9 * x or x == r)
            self._change_range(new)
        return value

    def _change_range(self, new: int) -> None:
        old = self.range_index
        self.range_index = new
        self.range_changes.append((self.clock.now(), RANGES_A[old], RANGES_A[new]))
        self.spend(self.autorange_delay * abs(new - old))

    def _measure(self) -> str:
        values = [self._one_reading() for _ in range(self.count)]
        self.last = ",".join(nr3(v) for v in values)
        return self.last

    def _fetch(self, _arg: str) -> str:
        if self.last is None:
            raise ScpiError(-230, "no reading yet")
        return self.last

    def _meas(self, arg: str) -> str:
        self._configure(arg)
        return self._measure()


# ===================================================================== gauge

GAUGE_UNITS = {"PA": 1.0, "MBAR": 100.0, "TORR": 101325.0 / 760.0}


class SimGauge(SimInstrument):
    """Ionisation gauge with an ASCII serial protocol of our own (one command per line,
    CR and/or LF; replies are one line). Two reply styles for ``PR?``
    (``simulation: gauge: reply_style:``):

    * ``coded`` (default; what the drivers' ``generic-ascii-gauge`` dialect reads):
      ``<status>,<pressure>`` with status 0 ok, 1 under-range (pressure = lower limit),
      2 over-range (upper limit), 3 filament off (``3,0.00E+00``);
    * ``words``: ``OK,<pressure>``, ``UNR``, ``OVR``, ``FIL,OFF``.

    ========== ==========================================================
    ``PR?``    the pressure in the selected unit (3 significant digits)
    ``FIL?``   ``ON`` / ``OFF``; ``FIL ON`` / ``FIL OFF`` -> ``OK``
    ``UNIT?``  ``PA`` / ``MBAR`` / ``TORR``; ``UNIT PA`` -> ``OK``
    ``ID?``    the identity line (``*IDN?`` is accepted too)
    other      ``ERR,SYNTAX``; a bad argument ``ERR,ARG``
    ========== ==========================================================

    Settings (``simulation: gauge:``): ``tau_s`` (first-order lag, 0.5 s; without it
    the chamber model's ``gauge_time_constant_s`` filter is used when there is one), ``range_pa`` ([1e-8, 1e-1]), ``protect_pa`` (the filament switches itself
    off above, 1.0), ``warmup_s`` (after ``FIL ON``, 2.0), ``unit`` (``MBAR``),
    ``reply_style``, ``baud`` (9600: each reply takes 10 bits per character, CR LF
    included, on the wire, reported through ``reply_delay``), ``serial``, ``model``.
    """

    ROLE = "gauge"
    MODEL = "SIM-GAUGE"
    KEYS = frozenset({"tau_s", "range_pa", "protect_pa", "warmup_s", "unit", "reply_style", "baud"})

    def __init__(self, clock, config=None, quirks=None, seed=0, sync=None, lock=None):
        super().__init__(clock, config, quirks, seed, sync, lock)
        c = self.config
        self.tau = float(c.get("tau_s", 0.5))
        #: an object with ``apply(t, p) -> shown`` (the chamber model's gauge filter)
        #: used instead of ``tau_s`` when the stand provides one
        self.lag = None
        lo, hi = c.get("range_pa", [1e-8, 1e-1])
        self.range_pa = (float(lo), float(hi))
        self.protect_pa = float(c.get("protect_pa", 1.0))
        self.warmup = float(c.get("warmup_s", 2.0))
        self.unit = str(c.get("unit", "MBAR")).upper()
        if self.unit not in GAUGE_UNITS:
            raise ValueError(f"simulation.gauge.unit must be one of {', '.join(GAUGE_UNITS)}")
        self.reply_style = str(c.get("reply_style", "coded"))
        if self.reply_style not in ("coded", "words"):
            raise ValueError("simulation.gauge.reply_style must be 'coded' or 'words'")
        self.filament = True
        self.fil_on_at = -math.inf
        self.baud = float(c.get("baud", 9600))
        self.p_shown: Optional[float] = None
        self.t_seen: Optional[float] = None
        self.events: List[tuple] = []

    def transmission_s(self, reply: str) -> float:
        """Serial transmission of the reply and its CR LF: 10 bits per character
        (8N1 framing, common practice) at ``baud``."""
        return (len(reply) + 2) * 10.0 / self.baud if self.baud > 0 else 0.0

    def observe(self, t: float, p_true: float) -> None:
        """The stand reports the chamber pressure at ``t``; the gauge lags behind it:
        tau dp_shown/dt = p - p_shown (first order; common practice, no source), by the
        chamber model's own gauge filter when the stand hands one in (``lag``)."""
        if self.lag is not None:
            self.p_shown = float(self.lag.apply(t, p_true))
        elif self.p_shown is None or self.t_seen is None or self.tau <= 0:
            self.p_shown = float(p_true)
        elif t > self.t_seen:
            self.p_shown = p_true + (self.p_shown - p_true) * math.exp(-(t - self.t_seen) / self.tau)
        self.t_seen = t
        if self.filament and self.p_shown > self.protect_pa:
            self.filament = False
            self.events.append((t, "filament-off", "over-pressure protection"))

    def filament_lit(self, t: float) -> bool:
        if self.quirks.active_at("filament-off", t) is not None:
            return False
        return self.filament and t - self.fil_on_at >= self.warmup

    def state(self, t: float) -> tuple:
        """(state, pressure in Pa) as the gauge shows it at ``t``."""
        if not self.filament_lit(t) or self.p_shown is None:
            return "filament-off", 0.0
        p = self.p_shown
        if p > self.range_pa[1]:
            return "over-range", self.range_pa[1]
        if p < self.range_pa[0]:
            return "under-range", self.range_pa[0]
        return "ok", p

    _CODES = {"ok": "0", "under-range": "1", "over-range": "2", "filament-off": "3"}
    _WORDS = {"under-range": "UNR", "over-range": "OVR", "filament-off": "FIL,OFF"}

    def pressure_reply(self, t: float) -> str:
        state, p = self.state(t)
        shown = f"{p / GAUGE_UNITS[self.unit]:.2E}"
        if self.reply_style == "coded":
            return f"{self._CODES[state]},{shown}"
        return f"OK,{shown}" if state == "ok" else self._WORDS[state]

    def _execute(self, line: str) -> Optional[str]:
        t = self.clock.now()
        parts = line.strip().upper().split()
        if not parts:
            return "ERR,SYNTAX"
        head, args = parts[0], parts[1:]
        if head == "PR?" and not args:
            return self.pressure_reply(t)
        if head in ("ID?", "*IDN?") and not args:
            return self.identity()
        if head == "FIL?" and not args:
            return "ON" if self.filament_lit(t) else "OFF"
        if head == "FIL" and len(args) == 1:
            if args[0] == "ON":
                if not self.filament:
                    self.filament = True
                    self.fil_on_at = t
                return "OK"
            if args[0] == "OFF":
                self.filament = False
                return "OK"
            return "ERR,ARG"
        if head == "UNIT?" and not args:
            return self.unit
        if head == "UNIT" and len(args) == 1:
            if args[0] not in GAUGE_UNITS:
                return "ERR,ARG"
            self.unit = args[0]
            return "OK"
        return "ERR,SYNTAX"


# ===================================================================== interlock

HOST_OUTPUTS = ("DTR", "RTS")
HOST_INPUTS = ("CTS", "DSR", "CD", "RI")


class SimInterlock(SimInstrument):
    """Interlock lines, modem-line style, seen from the host:

    * ``chain_line`` (host input, default CTS): the external interlock chain (doors,
      vacuum switch) is closed;
    * ``relay_line`` (host input, default DSR): the hardware watchdog relay is closed;
    * ``inhibit_line`` (host output, default RTS): high asserts the supply's inhibit;
    * ``heartbeat_line`` (host output, default DTR): every change of level is a heartbeat
      to the watchdog relay.

    The supply's interlock input is the series of chain, relay and not-inhibit. The relay
    is fitted when ``relay_timeout_s`` is set (``simulation: interlock:``): it drops
    ``relay_timeout_s`` after the last heartbeat, once the first heartbeat has armed it,
    and closes again on the next heartbeat (the supply's output stays off: an interlock
    trip is latched by the supply). Real relays differ; ``relay_start: open`` makes it
    fail-safe (open until the first heartbeat).

    Host API: ``set_line(name, level)`` / ``get_line(name)`` (what a fake serial port
    forwards), or as text over ``handle``: ``LINE <name> 0|1``, ``LINE? <name>`` -> ``0|1``,
    ``*IDN?``. Test API: ``open_chain()``, ``close_chain()``.
    """

    ROLE = "interlock"
    MODEL = "SIM-INTERLOCK"
    KEYS = frozenset({"chain_line", "relay_line", "inhibit_line", "heartbeat_line",
                      "relay_timeout_s", "relay_start"})

    def __init__(self, clock, config=None, quirks=None, seed=0, sync=None, lock=None):
        super().__init__(clock, config, quirks, seed, sync, lock)
        c = self.config
        self.chain_line = str(c.get("chain_line", "CTS")).upper()
        self.relay_line = str(c.get("relay_line", "DSR")).upper()
        self.inhibit_line = str(c.get("inhibit_line", "RTS")).upper()
        self.heartbeat_line = str(c.get("heartbeat_line", "DTR")).upper()
        rt = c.get("relay_timeout_s")
        self.relay_timeout = None if rt is None else float(rt)
        self.relay_start_open = str(c.get("relay_start", "closed")) == "open"
        self.chain_closed = True
        self.levels = {name: False for name in HOST_OUTPUTS}
        self.last_beat: Optional[float] = None
        self.events: List[tuple] = []

    # -- the relay and the supply's interlock input
    def relay_closed(self, t: float) -> bool:
        if self.relay_timeout is None:
            return True
        if self.last_beat is None:
            return not self.relay_start_open
        return t - self.last_beat <= self.relay_timeout

    def inhibitor(self, t0: float, t1: float) -> Optional[tuple]:
        """For the supply: the earliest moment in [t0, t1] its interlock input is open."""
        if not self.chain_closed:
            return (t0, "interlock")
        if self.levels[self.inhibit_line]:
            return (t0, "interlock")
        if self.relay_timeout is not None:
            if self.last_beat is None:
                return (t0, "interlock") if self.relay_start_open else None
            drop = self.last_beat + self.relay_timeout
            if drop <= t1:
                return (max(t0, drop), "interlock")
        return None

    # -- host side
    def set_line(self, name: str, level: bool) -> None:
        with self._lock:
            name = name.upper()
            if name not in HOST_OUTPUTS:
                raise ValueError(f"{name} is not a host output line ({', '.join(HOST_OUTPUTS)})")
            t = self.clock.now()
            self.sync(t)
            level = bool(level)
            if name == self.heartbeat_line and level != self.levels[name]:
                if self.relay_timeout is not None and not self.relay_closed(t):
                    self.events.append((t, "relay-closed", "heartbeat resumed"))
                self.last_beat = t
            if name == self.inhibit_line and level != self.levels[name]:
                self.events.append((t, "inhibit", "on" if level else "off"))
            self.levels[name] = level

    def get_line(self, name: str) -> bool:
        with self._lock:
            name = name.upper()
            t = self.clock.now()
            self.sync(t)
            if name in HOST_OUTPUTS:
                return self.levels[name]
            if name == self.chain_line:
                return self.chain_closed
            if name == self.relay_line:
                return self.relay_closed(t)
            if name in HOST_INPUTS:
                return False
            raise ValueError(f"unknown line {name}")

    def open_chain(self) -> None:
        with self._lock:
            self.sync()
            self.chain_closed = False
            self.events.append((self.clock.now(), "chain", "open"))

    def close_chain(self) -> None:
        with self._lock:
            self.sync()
            self.chain_closed = True
            self.events.append((self.clock.now(), "chain", "closed"))

    def _execute(self, line: str) -> Optional[str]:
        parts = line.strip().upper().split()
        if parts == ["*IDN?"]:
            return self.identity()
        try:
            if len(parts) == 2 and parts[0] == "LINE?":
                return "1" if self.get_line(parts[1]) else "0"
            if len(parts) == 3 and parts[0] == "LINE" and parts[2] in ("0", "1"):
                self.set_line(parts[1], parts[2] == "1")
                return None
        except ValueError:
            return "ERR,ARG"
        return "ERR,SYNTAX"
