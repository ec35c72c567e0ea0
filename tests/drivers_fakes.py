"""Fake instruments for the driver tests (our own, deliberately simple and scriptable).

Each fake is a ``CommandInterpreter``: ``handle(line)`` returns the reply or None and
records every line in ``log``. Quirks are plain attributes a test sets: lie about a
readback, ignore output-off, hang, answer garbage, fill the error queue.
"""
from __future__ import annotations

import math
import threading
from collections import deque

from drivers.clock import VirtualClock

# SCPI-99 Vol. 2 §21.8 error numbers (from memory): -113 Undefined header
UNDEFINED_HEADER = (-113, "Undefined header")
ESR_CME = 0x20  # IEEE 488.2 §11.5.1.1 command error bit (from memory)


class FakeScpi:
    """Common IEEE 488.2 part: *IDN?, *CLS, *ESR?, *OPC?, SYST:ERR?, quirks."""

    def __init__(self, idn, clock=None):
        self.idn = idn
        self.clock = clock or VirtualClock()
        self.log = []
        self.errors = deque()
        self.esr = 0
        self.never_empty_queue = False
        self.delays = {}          # command prefix -> reply delay (s, or math.inf)
        self.garbage = {}         # command prefix -> reply text to send instead
        self.block = {}           # command prefix -> threading.Event to wait on in handle
        self.received = threading.Event()
        self.disconnects = 0

    def disconnect(self):
        self.disconnects += 1

    def reply_delay(self, line):
        for prefix, d in self.delays.items():
            if line.upper().startswith(prefix):
                return d
        return 0.0

    def error(self, code_text):
        self.errors.append(code_text)
        self.esr |= ESR_CME

    def handle(self, line):
        self.log.append(line)
        self.received.set()
        up = line.strip().upper()
        for prefix, ev in self.block.items():
            if up.startswith(prefix):
                ev.wait(10)
        for prefix, text in self.garbage.items():
            if up.startswith(prefix):
                return text
        if up == "*IDN?":
            return self.idn
        if up == "*CLS":
            self.errors.clear()
            self.esr = 0
            return None
        if up == "*ESR?":
            v, self.esr = self.esr, 0
            return str(v)
        if up == "*OPC?":
            return "1"
        if up == "SYST:ERR?":
            if self.never_empty_queue:
                return '-350,"Queue overflow"'
            if self.errors:
                code, text = self.errors.popleft()
                return f'{code},"{text}"'
            return '0,"No error"'
        reply = self.command(up)
        return reply

    def command(self, up):  # pragma: no cover - overridden
        self.error(UNDEFINED_HEADER)
        return None


def _arg(up):
    head, _, arg = up.partition(" ")
    return head, arg.strip()


class FakeSupply(FakeScpi):
    """A HV supply: output filter bleeds down with time constant ``tau`` (s) after
    output-off (voltage decays as exp(-t/tau))."""

    def __init__(self, idn="KESTREL LANE,HV-30K,SN1042,1.0", clock=None, tau=0.3):
        super().__init__(idn, clock)
        self.output = False
        self.setv = 0.0
        self.ilim = 0.0
        self.ovp = 30000.0
        self.tau = tau
        self._v_off = 0.0
        self._t_off = 0.0
        self.ignore_output_off = False
        self.readback_scale = {}    # "SOUR:CURR?" -> factor applied to the readback
        self.current = 1e-9
        self.cc = False
        self.on_output_on = None

    def volts(self):
        if self.output:
            return self.setv
        return self._v_off * math.exp(-(self.clock.now() - self._t_off) / self.tau)

    def _off(self):
        if self.ignore_output_off:
            return
        if self.output:
            self._v_off, self._t_off = self.setv, self.clock.now()
        self.output = False

    def command(self, up):
        head, arg = _arg(up)
        rb = self.readback_scale.get(head, 1.0)
        if head == "SOUR:VOLT" and arg:
            v = float(arg)
            if v > self.ovp:
                self.error((-222, "Data out of range"))
                return None
            self.setv = v
            return None
        if head == "SOUR:VOLT?":
            return repr(self.setv * rb)
        if head == "SOUR:CURR" and arg:
            self.ilim = float(arg)
            return None
        if head == "SOUR:CURR?":
            return repr(self.ilim * rb)
        if head == "SOUR:VOLT:PROT" and arg:
            self.ovp = float(arg)
            return None
        if head == "SOUR:VOLT:PROT?":
            return repr(self.ovp * rb)
        if head == "OUTP" and arg in ("ON", "1"):
            self.output = True
            if self.on_output_on:
                self.on_output_on()
            return None
        if head == "OUTP" and arg in ("OFF", "0"):
            self._off()
            return None
        if head == "OUTP?":
            return "1" if self.output else "0"
        if head == "MEAS:VOLT?":
            return repr(self.volts())
        if head == "MEAS:CURR?":
            return repr(self.current)
        if head == "STAT:OPER:COND?":
            return "0"
        if head == "STAT:QUES:COND?":
            return str(2 if self.cc else 0)
        self.error(UNDEFINED_HEADER)
        return None


class FakeAmmeter(FakeScpi):
    def __init__(self, idn="KESTREL LANE,PA-9,SN77,2.1", clock=None):
        super().__init__(idn, clock)
        self.func = '"CURR"'
        self.auto = False
        self.range = 2e-2
        self.nplc = 5.0
        self.lfr = 50.0
        self.short = True
        self.zcor = True
        self.values = deque()
        self.value = 1.5e-9
        self.ignore = set()         # headers whose writes are silently ignored

    def command(self, up):
        head, arg = _arg(up)
        if head in self.ignore and arg:
            return None
        if head == "SENS:FUNC" and arg:
            self.func = arg
            return None
        if head == "SENS:FUNC?":
            return self.func
        if head == "SENS:CURR:RANG:AUTO" and arg:
            self.auto = arg in ("1", "ON")
            return None
        if head == "SENS:CURR:RANG:AUTO?":
            return "1" if self.auto else "0"
        if head == "SENS:CURR:RANG" and arg:
            self.range = float(arg)
            return None
        if head == "SENS:CURR:RANG?":
            return repr(self.range)
        if head == "SENS:CURR:NPLC" and arg:
            self.nplc = float(arg)
            return None
        if head == "SENS:CURR:NPLC?":
            return repr(self.nplc)
        if head == "SYST:LFR" and arg:
            self.lfr = float(arg)
            return None
        if head == "SYST:LFR?":
            return repr(self.lfr)
        if head == "INP:SHOR" and arg:
            self.short = arg in ("1", "ON")
            return None
        if head == "INP:SHOR?":
            return "1" if self.short else "0"
        if head == "SENS:CORR:STAT" and arg:
            self.zcor = arg in ("1", "ON")
            return None
        if head == "SENS:CORR:STAT?":
            return "1" if self.zcor else "0"
        if head == "READ?":
            v = self.values.popleft() if self.values else self.value
            return v if isinstance(v, str) else repr(v)
        self.error(UNDEFINED_HEADER)
        return None


class Echo:
    """Minimal interpreter for transport tests: *IDN?, *OPC?, and ``X?`` -> ``X``."""

    def __init__(self, clock=None):
        self.clock = clock
        self.delays = {}
        self.lines = []
        self.received = threading.Event()

    def handle(self, line):
        self.lines.append(line)
        self.received.set()
        up = line.strip().upper()
        if up == "*IDN?":
            return "KESTREL LANE,ECHO,SN1,0.1"
        if up == "*OPC?":
            return "1"
        if up.endswith("?"):
            return up[:-1]
        return None

    def reply_delay(self, line):
        return self.delays.get(line.strip().upper(), 0.0)


class FakeGauge:
    """ASCII gauge controller: ``PR?`` -> ``<status>,<pressure mbar>``."""

    def __init__(self, reply="0,2.5E-07"):
        self.reply = reply
        self.log = []

    def handle(self, line):
        self.log.append(line)
        return self.reply if line.strip().upper() == "PR?" else None
