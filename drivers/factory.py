"""Build an instrument driver from a rig file's entry: role, driver, address, dialect.

    open_instrument(role, driver, address, dialect=None, clock=None, options=None,
                    interpreter=None) -> ScpiSupply | ScpiAmmeter | AsciiGauge | LineInterlock

See docs/dev-drivers.md for the addresses, drivers and options.
"""
from __future__ import annotations

from typing import Any, Mapping, Optional

from .clock import Clock, WallClock
from .dialect import DEFAULT_DIALECTS, load_dialect
from .errors import DriverError
from . import locks

#: role -> the drivers that can fill it (the rig file's ``driver:``; first is the default)
DRIVERS = {"supply": ("scpi-supply", "scpi"), "ammeter": ("scpi-ammeter", "scpi"),
           "gauge": ("ascii-gauge", "ascii"), "interlock": ("serial-lines", "lines")}
_OPTIONS = {"name", "timeout", "backend", "expected_model", "expected_serial", "rig_max_v",
            "rig_max_a", "inhibit", "stand_id", "lock", "state_dir", "verify_setpoint",
            "chain_line", "chain_closed_level", "heartbeat_line", "inhibit_line",
            "inhibit_level", "nodelay", "transcript",
            # read by the engine and the timing budget, not by the factory:
            "nplc", "line_hz", "readings_per_sample", "range_a"}


def address_kind(address: str) -> str:
    """"sim", "serial" (device path or pyserial URL) or "visa"."""
    if address.startswith("sim:"):
        return "sim"
    if address.startswith("serial:") or "://" in address:
        return "serial"
    return "visa"


def open_transport(address: str, timeout: float = 1.0, sentinel=("*OPC?", "1"),
                   clock: Optional[Clock] = None, interpreter=None, stand_id: Optional[str] = None,
                   backend: str = "@py", term: str = "\n", write_term: Optional[str] = None,
                   nodelay: bool = True):
    """A transport for ``address`` (no lock taken)."""
    kind = address_kind(address)
    if kind == "sim":
        if interpreter is None:
            raise DriverError(address, "a sim: address needs the simulated instrument object "
                                       "(the stand builder passes it as interpreter=)")
        from .transport_inproc import InprocTransport
        stand = stand_id if stand_id is not None else f"obj{id(interpreter):x}"
        resource = f"sim:{stand}/{address[4:]}"
        return InprocTransport(interpreter, resource=resource, timeout=timeout, clock=clock,
                               sentinel=sentinel)
    if kind == "serial":
        from .transport_serial import SerialTransport
        return SerialTransport(address, timeout=timeout, sentinel=sentinel, term=term,
                               write_term=write_term)
    from .transport_visa import VisaTransport
    return VisaTransport(address, timeout=timeout, backend=backend, sentinel=sentinel,
                         nodelay=nodelay)


def open_instrument(role: str, driver: Optional[str], address: str, dialect=None,
                    clock: Optional[Clock] = None, options: Optional[Mapping[str, Any]] = None,
                    interpreter=None):
    """Open the transport, take the resource lock, and build the role's driver.

    ``options`` (all optional): ``name``, ``timeout`` (s, default 1.0), ``backend``
    (VISA backend name, default "@py"), ``expected_model``, ``expected_serial``,
    ``rig_max_v``, ``rig_max_a``, ``inhibit`` (callable), ``stand_id`` (keys sim:
    instruments per stand), ``lock`` (default True), ``state_dir``, ``verify_setpoint``,
    and for interlocks ``chain_line``, ``chain_closed_level``, ``heartbeat_line``,
    ``inhibit_line``, ``inhibit_level``; ``transcript`` (a file: every exchange is
    recorded there by ``drivers.transcript``, for test fixtures).
    """
    opts = dict(options or {})
    unknown = sorted(set(opts) - _OPTIONS)
    if unknown:
        raise DriverError(address, f"unknown instrument option(s) {unknown}")
    if role not in DRIVERS:
        raise DriverError(address, f"role {role!r} is not one of {sorted(DRIVERS)}")
    driver = driver or DRIVERS[role][0]
    if driver not in DRIVERS[role]:
        raise DriverError(address, f"driver {driver!r} cannot fill role {role!r} "
                                   f"(use {', '.join(DRIVERS[role])})")
    clock = clock or getattr(interpreter, "clock", None) or WallClock()
    d = None
    if role != "interlock":
        d = load_dialect(dialect or DEFAULT_DIALECTS[role], role)
    name = opts.get("name", role)
    sentinel = d.sentinel if d is not None else None
    term = (d.get("serial.term") if d is not None else None) or "\n"
    write_term = d.get("serial.write_term") if d is not None else None
    if d is not None and address_kind(address) == "serial" and d.get("serial.baud") \
            and address.startswith("serial:") and "baud=" not in address:
        address = address + ("&" if "?" in address else "?") + f"baud={int(d.get('serial.baud'))}"
    transport = open_transport(address, timeout=float(opts.get("timeout", 1.0)), sentinel=sentinel,
                               clock=clock, interpreter=interpreter, stand_id=opts.get("stand_id"),
                               backend=opts.get("backend", "@py"), term=term, write_term=write_term,
                               nodelay=bool(opts.get("nodelay", True)))
    if opts.get("transcript"):
        from .transcript import TranscriptTransport   # every exchange to a JSON-lines file
        transport = TranscriptTransport(transport, str(opts["transcript"]))
    if opts.get("lock", True):
        try:
            handle = locks.hold(transport.resource, opts.get("state_dir"))
        except Exception:
            transport.close()
            raise
        transport.on_close.append(handle.release)
    try:
        if role == "supply":
            from .supply import ScpiSupply
            return ScpiSupply(transport, d, name=name, clock=clock,
                              expected_model=opts.get("expected_model"),
                              expected_serial=opts.get("expected_serial"),
                              rig_max_v=opts.get("rig_max_v"), rig_max_a=opts.get("rig_max_a"),
                              inhibit=opts.get("inhibit"),
                              verify_setpoint=bool(opts.get("verify_setpoint", True)))
        if role == "ammeter":
            from .ammeter import ScpiAmmeter
            return ScpiAmmeter(transport, d, name=name, clock=clock,
                               expected_model=opts.get("expected_model"),
                               expected_serial=opts.get("expected_serial"))
        if role == "gauge":
            from .gauge import AsciiGauge
            return AsciiGauge(transport, d, name=name, clock=clock)
        from .interlock import LineInterlock
        kw = {k: opts[k] for k in ("chain_line", "chain_closed_level", "heartbeat_line",
                                   "inhibit_line", "inhibit_level") if k in opts}
        return LineInterlock(transport, name=name, **kw)
    except Exception:
        transport.close()
        raise
