"""SCPI high-voltage supply driver: strict ``arm()``, write-on-change setpoints, and a
``safe_off()`` that escalates until the output is confirmed off or says it could not.

Safety rules kept here (and tested in tests/test_drivers_supply.py):

* ``arm()`` refuses on any mismatch, in this order: output found on or voltage not near
  zero; ``*IDN?`` model/serial not the rig's; then ``*CLS``; 0 V, current limit and
  over-voltage limit programmed and each read back within the dialect's tolerance; the
  error queue drained (bounded); the communication timeout programmed where the supply
  has one; only then output on, confirmed, with the voltage still near zero.
* ``*RST`` is never sent (it would drop the protection settings of a live run).
* every safety-relevant write is followed by ``*ESR?`` (one send with the write) or a
  readback of the setting.
* ``safe_off()`` is single-flight and idempotent and sets the per-instrument latch first
  (``drivers.latch``): no energising command passes until a new ``arm()``.
"""
from __future__ import annotations

import math
import time
from typing import Callable, List, Optional, Tuple

from . import hooks as _hooks
from . import latch as _latch
from .clock import Clock, WallClock
from .dialect import Dialect, load_dialect, quantize
from .errors import (ArmRefused, DriverError, IdentityMismatch, LatchedOff,
                     UnsafeStateError)
from .roles import ArmReport, Identity, SafeOffReport, Supply, SupplyState
from .scpi import (ESR_ERRORS, drain_errors, parse_bool, parse_identity, parse_int,
                   parse_number, special_flag)


class ScpiSupply(Supply):
    """A SCPI supply described by a dialect, over any ``Transport``.

    ``expected_model``/``expected_serial`` come from the rig file; ``rig_max_v`` and
    ``rig_max_a`` are the rig's hard maxima (never exceeded by any limit written);
    ``inhibit`` is a callable ``inhibit(on)`` (e.g. ``Interlock.inhibit``) used as the last
    escalation of ``safe_off()``; ``latch_key`` names the instrument for the shared latch
    (default: the transport's resource).
    """

    def __init__(self, transport, dialect: Dialect | str = "generic-scpi-supply",
                 name: str = "supply", clock: Optional[Clock] = None,
                 expected_model: Optional[str] = None, expected_serial: Optional[str] = None,
                 rig_max_v: Optional[float] = None, rig_max_a: Optional[float] = None,
                 inhibit: Optional[Callable[[bool], None]] = None,
                 latch_key: Optional[str] = None, verify_setpoint: bool = True):
        self.transport = transport
        self.dialect = load_dialect(dialect, "supply")
        self.name = name
        self.clock = clock or WallClock()
        self.expected_model = expected_model
        self.expected_serial = expected_serial
        d = self.dialect
        self.max_v = min(x for x in (rig_max_v, d.number("limits.max_voltage_v")) if x)
        self.max_a = min(x for x in (rig_max_a, d.number("limits.max_current_a")) if x)
        self.inhibit_line = inhibit
        self.latch_key = latch_key or getattr(transport, "resource", name)
        self.verify_setpoint = verify_setpoint
        self.where = f"{name} ({getattr(transport, 'resource', '?')})"
        self._identity: Optional[Identity] = None
        self._epoch: Optional[int] = None
        self._last_v: Optional[float] = None
        self._v_ovp: Optional[float] = None
        self._i_limit: Optional[float] = None
        self._entry_cache = None

    # -- plumbing ----------------------------------------------------------------------------
    def _entry(self):
        # keyed without I/O so every session to the instrument finds the same entry: the
        # rig's serial number when known ("?" otherwise) and the resource
        if self._entry_cache is None:
            self._entry_cache = _latch.entry(self.latch_key, self.expected_serial or "?")
        return self._entry_cache

    @property
    def latched(self) -> bool:
        return not _latch.may_energise(self._entry(), self._epoch)

    def _trusted(self) -> None:
        if not self.transport.trusted:
            self.transport.resync()

    def _query(self, cmd: str, parse=None):
        """Ask ``cmd``; with ``parse``, parse the reply. A reply that does not parse may be
        a late answer to something else: the session is then untrusted (resync next)."""
        self._trusted()
        reply = self.transport.query(cmd)
        if parse is None:
            return reply
        try:
            return parse(self.where, reply)
        except DriverError:
            self.transport.trusted = False
            raise

    def _write(self, cmd: str) -> None:
        self._trusted()
        self.transport.write(cmd)

    def _exchange(self, writes, query: str) -> str:
        self._trusted()
        return self.transport.exchange(writes, query)

    def _cmd(self, key: str, **numbers: float) -> str:
        return self.dialect.command(key, **numbers)

    def _query_number(self, key: str) -> float:
        x = self._query(self._cmd(key), parse_number)
        return math.nan if special_flag(x) else x

    def _tol(self, kind: str, value: float) -> float:
        d = self.dialect
        abs_tol = d.number("readback.voltage_abs_v" if kind == "V" else "readback.current_abs_a")
        return abs_tol + d.number("readback.rel", 0.0) * abs(value)

    def _check_esr(self, context: str, esr_reply: Optional[str] = None,
                   error=DriverError) -> None:
        """IEEE 488.2 §11.5.1 (from memory): QYE/DDE/EXE/CME bits mean the last commands
        were not carried out as sent."""
        reply = esr_reply if esr_reply is not None else self._query(self._cmd("event_status"))
        esr = parse_int(self.where, reply)
        if esr & ESR_ERRORS:
            errors, _ = self._drain()
            raise error(self.where, f"{context}: instrument flagged an error "
                                          f"(*ESR? = {esr}; queue {errors or 'empty'})")

    def _drain(self) -> Tuple[list, bool]:
        return drain_errors(self.transport, self.where, self._cmd("error_query"),
                            int(self.dialect.get("error_queue_cap", 32)))

    def _readback(self, key: str, expected: float, kind: str) -> float:
        got = self._query_number(key)
        if not math.isfinite(got) or abs(got - expected) > self._tol(kind, expected):
            raise ArmRefused(self.where, f"{key.replace('get_', '')} reads back {got:g} {kind}, "
                                         f"programmed {expected:g} {kind}")
        return got

    def _energise_check(self, what: str) -> None:
        if not _latch.may_energise(self._entry(), self._epoch):
            raise LatchedOff(self.where, f"{what} refused: the supply was safed (or re-armed by "
                                         "another session); arm() again first")

    # -- identity and arm ------------------------------------------------------------------------
    def identify(self) -> Identity:
        self._trusted()
        self._identity = self._query("*IDN?", parse_identity)
        return self._identity

    def _check_identity(self, ident: Identity) -> None:
        if self.expected_model and ident.model != self.expected_model:
            raise IdentityMismatch(self.where, f"model is {ident.model!r}, the rig file names "
                                               f"{self.expected_model!r}")
        if self.expected_serial and ident.serial != self.expected_serial:
            raise IdentityMismatch(self.where, f"serial is {ident.serial!r}, the rig file names "
                                               f"{self.expected_serial!r}")

    def arm(self, v_ovp: float, i_limit: float, comm_timeout_s: Optional[float] = None,
            near_zero_v: Optional[float] = None) -> ArmReport:
        """Program the hardware limits (``v_ovp`` in V, ``i_limit`` in A: compute them with
        ``drivers.roles.hardware_limits``) and switch the output on at 0 V."""
        d = self.dialect
        near = float(near_zero_v) if near_zero_v is not None else d.number("output_off.threshold_v")
        for label, x, top in (("over-voltage limit", v_ovp, self.max_v),
                              ("current limit", i_limit, self.max_a)):
            if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x) or x <= 0:
                raise ArmRefused(self.where, f"{label} {x!r} must be a positive number")
            if x > top:
                raise ArmRefused(self.where, f"{label} {x:g} exceeds the maximum {top:g} "
                                             "(rig file or dialect)")
        if comm_timeout_s is not None and not (comm_timeout_s > 0 and math.isfinite(comm_timeout_s)):
            raise ArmRefused(self.where, f"communication timeout {comm_timeout_s!r} must be positive")
        steps: List[Tuple[str, str]] = []
        self._trusted()
        # 1. output found off, voltage near zero
        if self._query(self._cmd("get_output"), parse_bool):
            raise ArmRefused(self.where, "output is already on: refusing to take over an "
                                         "energised supply (switch it off at the supply)")
        v0 = self._query_number("measure_voltage")
        if not math.isfinite(v0) or abs(v0) > near:
            raise ArmRefused(self.where, f"measured {v0:g} V with the output off; expected below "
                                         f"{near:g} V (output filter still charged?)")
        steps.append(("output found off", f"{v0:g} V"))
        # 2. identity
        ident = self.identify()
        self._check_identity(ident)
        steps.append(("identity", ident.raw))
        # 3. clear status
        self._write(self._cmd("clear_status"))
        steps.append(("*CLS", ""))
        # 4. 0 V, current limit, OVP; each read back
        i_q = quantize(i_limit, d.number("resolution.current_a"))
        v_q = quantize(v_ovp, d.number("resolution.voltage_v"))
        self._write(self._cmd("set_voltage", volts=0.0))
        self._readback("get_voltage", 0.0, "V")
        self._last_v = 0.0
        steps.append(("0 V", "read back"))
        self._write(self._cmd("set_current_limit", amps=i_q))
        self._readback("get_current_limit", i_q, "A")
        steps.append(("current limit", f"{i_q:g} A"))
        self._write(self._cmd("set_ovp", volts=v_q))
        self._readback("get_ovp", v_q, "V")
        steps.append(("over-voltage limit", f"{v_q:g} V"))
        errors, emptied = self._drain()
        if errors or not emptied:
            raise ArmRefused(self.where, f"error queue after programming: {errors}"
                                         + ("" if emptied else " (queue never emptied)"))
        # 5. communication timeout
        programmed_ct = None
        if comm_timeout_s is not None:
            if d.has("set_comm_timeout"):
                self._write(self._cmd("set_comm_timeout", seconds=float(comm_timeout_s)))
                self._check_esr("communication timeout", error=ArmRefused)
                programmed_ct = float(comm_timeout_s)
                steps.append(("communication timeout", f"{programmed_ct:g} s"))
            else:
                steps.append(("communication timeout", "not supported by this supply"))
        # 6. output on, confirmed, voltage still near zero
        self._v_ovp, self._i_limit = v_q, i_q
        self._epoch = _latch.new_epoch(self._entry())
        try:
            self._write(self._cmd("output_on"))
            if not self._query(self._cmd("get_output"), parse_bool):
                raise ArmRefused(self.where, "output-on was not confirmed by the supply")
            v1 = self._query_number("measure_voltage")
            if not math.isfinite(v1) or abs(v1) > near:
                raise ArmRefused(self.where, f"output on at 0 V but measured {v1:g} V")
            self._check_esr("output on", error=ArmRefused)
        except Exception:
            try:
                self.safe_off()
            except DriverError:
                pass
            raise
        steps.append(("output on", f"{v1:g} V"))
        return ArmReport(self.where, ident, v_q, i_q, programmed_ct, tuple(steps))

    # -- energising commands -----------------------------------------------------------------
    def set_voltage(self, v: float) -> None:
        """Program ``v`` volts (a magnitude); written only when it changes."""
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v < 0:
            raise DriverError(self.where, f"voltage {v!r} must be a finite magnitude >= 0")
        self._energise_check(f"set_voltage({v:g})")
        if self._v_ovp is not None and v > self._v_ovp:
            raise DriverError(self.where, f"{v:g} V is above the armed over-voltage limit "
                                          f"{self._v_ovp:g} V")
        q = quantize(v, self.dialect.number("resolution.voltage_v"))
        if q == self._last_v:
            return
        self._last_v = None
        cmd = self._cmd("set_voltage", volts=q)
        if self.verify_setpoint:
            esr = self._exchange([cmd], self._cmd("event_status"))
        else:
            self._write(cmd)
        if not _latch.may_energise(self._entry(), self._epoch):
            # safed while this call was in flight: undo what we just wrote, then refuse
            try:
                self._write(self._cmd("set_voltage", volts=0.0))
            except DriverError:
                pass
            raise LatchedOff(self.where, "the supply was safed while set_voltage was in flight")
        if self.verify_setpoint:
            self._check_esr(f"set_voltage({q:g})", esr)
        self._last_v = q

    def set_current_limit(self, a: float) -> None:
        if not (isinstance(a, (int, float)) and math.isfinite(a) and a > 0):
            raise DriverError(self.where, f"current limit {a!r} must be positive")
        if a > self.max_a:
            raise DriverError(self.where, f"current limit {a:g} A above the maximum {self.max_a:g} A")
        if self._i_limit is None or a > self._i_limit:
            self._energise_check("raising the current limit")
        q = quantize(a, self.dialect.number("resolution.current_a"))
        self._write(self._cmd("set_current_limit", amps=q))
        got = self._query_number("get_current_limit")
        if abs(got - q) > self._tol("A", q):
            raise DriverError(self.where, f"current limit reads back {got:g} A, wrote {q:g} A")
        self._i_limit = q

    def set_ovp(self, v: float) -> None:
        if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
            raise DriverError(self.where, f"over-voltage limit {v!r} must be positive")
        if v > self.max_v:
            raise DriverError(self.where, f"over-voltage limit {v:g} V above the maximum {self.max_v:g} V")
        if self._v_ovp is None or v > self._v_ovp:
            self._energise_check("raising the over-voltage limit")
        q = quantize(v, self.dialect.number("resolution.voltage_v"))
        self._write(self._cmd("set_ovp", volts=q))
        got = self._query_number("get_ovp")
        if abs(got - q) > self._tol("V", q):
            raise DriverError(self.where, f"over-voltage limit reads back {got:g} V, wrote {q:g} V")
        self._v_ovp = q

    def output(self, on: bool) -> None:
        if on:
            self._energise_check("output on")
            self._write(self._cmd("output_on"))
        else:
            self._write(self._cmd("output_off"))
        got = self._query(self._cmd("get_output"), parse_bool)
        if got != bool(on):
            raise DriverError(self.where, f"output {'on' if on else 'off'} not confirmed "
                                          f"(supply reports {'on' if got else 'off'})")

    # -- readings ----------------------------------------------------------------------------
    def measure_voltage(self) -> float:
        return self._query_number("measure_voltage")

    def measure_current(self) -> float:
        return self._query_number("measure_current")

    def state(self) -> SupplyState:
        d = self.dialect
        raw = {"output": self._query(self._cmd("get_output"), parse_bool)}
        for reg, key in (("operation", "get_operation"), ("questionable", "get_questionable")):
            if d.has(key):
                raw[reg] = self._query(self._cmd(key), parse_int)

        def bit(flag: str) -> Optional[bool]:
            spec = d.get(f"status.{flag}")
            if not spec or spec["register"] not in raw:
                return None
            bits = spec.get("bits", [spec.get("bit")])
            return any(raw[spec["register"]] >> b & 1 for b in bits)
        interlock_open = bit("interlock_open")
        if d.has("get_interlock"):
            raw["interlock"] = self._query(self._cmd("get_interlock"), parse_bool)
            interlock_open = not raw["interlock"]
        return SupplyState(output_on=raw["output"], cc=bool(bit("cc")), tripped=bool(bit("tripped")),
                           interlock_open=interlock_open, raw=raw)

    # -- safe off -----------------------------------------------------------------------------
    def safe_off(self) -> SafeOffReport:
        """Output off, then 0 V, read back until confirmed; escalate; else raise
        ``UnsafeStateError``. Single-flight: a second caller waits for the running one."""
        e = self._entry()
        _latch.set_latched(e)
        if not e.safe_off_lock.acquire(blocking=False):
            e.waiter_arrived.set()
            if e.safe_off_lock.acquire(timeout=self._takeover_after_s()):
                e.safe_off_lock.release()
                if e.last_error is not None:
                    raise e.last_error
                return e.last_report
            # The running safe_off() is stuck on its own session (a hung wire, a call that
            # never returns): waiting longer cannot help. Wake it and switch off through
            # this session instead; the latch is already set, so the woken one cannot
            # re-energise anything.
            other = e.running
            if other is not None and other is not self:
                try:
                    other.abort()
                except Exception:   # noqa: BLE001 - best effort on a dead session
                    pass
            report = self._safe_off_sequence()
            e.taken_over = report          # the woken first caller reports this one
            return report
        try:
            e.running = self
            e.last_error = None
            e.taken_over = None
            report = self._safe_off_sequence()
            e.last_report = report
            return report
        except UnsafeStateError as exc:
            if e.taken_over is not None and e.taken_over.confirmed:
                # this session was woken because another took over and confirmed the
                # output off: the instrument is off, which is what the caller asked
                e.last_report = e.taken_over
                return e.taken_over
            e.last_error = exc
            raise
        finally:
            e.running = None
            e.safe_off_lock.release()

    #: real seconds a second safe_off() waits before taking over (None: from the dialect)
    takeover_after_s: Optional[float] = None

    def _takeover_after_s(self) -> float:
        """Real seconds a second safe_off() waits for a running one before it takes over:
        the running sequence's own worst case while its calls still answer or time out
        (three readbacks, each bounded by bleed-down + 2 timeouts, and about ten calls of
        writes, clears and resyncs), plus one second. Only a call that never returns
        outlasts it."""
        if self.takeover_after_s is not None:
            return float(self.takeover_after_s)
        try:
            bleed = float(self.dialect.number("output_off.bleed_down_s"))
        except Exception:   # noqa: BLE001
            bleed = 5.0
        timeout = float(getattr(self.transport, "timeout", 2.0) or 2.0)
        return 3.0 * (bleed + 2.0 * timeout) + 10.0 * timeout + 1.0

    def _safe_off_sequence(self) -> SafeOffReport:
        steps: List[Tuple[str, bool, str]] = []
        t = self.transport

        def attempt(label: str, fn) -> bool:
            try:
                detail = fn()
                steps.append((label, True, "" if detail is None else str(detail)))
                return True
            except Exception as exc:  # noqa: BLE001 - every step is tried even after failures
                steps.append((label, False, str(exc)))
                return False

        tries = [0]

        def off_writes() -> None:
            tries[0] += 1
            if not t.trusted:
                attempt("resync", t.resync)
            attempt("output off", lambda: t.write(self._cmd("output_off")))
            _hooks.fire("supply.safe_off.after-output-off", supply=self, attempt=tries[0])
            attempt("0 V", lambda: t.write(self._cmd("set_voltage", volts=0.0)))
            _hooks.fire("supply.safe_off.after-zero-volts", supply=self, attempt=tries[0])
            self._last_v = None

        def confirm():
            _hooks.fire("supply.safe_off.before-confirm", supply=self, attempt=tries[0])
            return self._confirm_off(steps)

        off_writes()
        ok, v, out = confirm()
        escalated = False
        if not ok:
            escalated = True
            attempt("device clear", lambda: "done" if t.device_clear() else "bus has none")
            attempt("resync", t.resync)
            off_writes()
            ok, v, out = confirm()
        if not ok:
            attempt("reopen", t.reopen)
            attempt("resync", t.resync)
            attempt("re-identify", self._reidentify)
            off_writes()
            ok, v, out = confirm()
        if not ok and self.inhibit_line is not None:
            attempt("inhibit line", lambda: self.inhibit_line(True))
            ok, v, out = self._confirm_off(steps)
        report = SafeOffReport(self.where, ok, v, out, tuple(steps), escalated, self.clock.now())
        if not ok:
            failed = ", ".join(f"{s}" for s, good, _ in steps if not good) or "none"
            raise UnsafeStateError(self.where, f"output-off NOT confirmed (output "
                                               f"{'unknown' if out is None else ('on' if out else 'off')}, "
                                               f"{v:g} V) after device clear, reopen and "
                                               f"{'inhibit' if self.inhibit_line else 'no inhibit line'}; "
                                               f"failed steps: {failed}")
        return report

    def _reidentify(self) -> str:
        want = self.expected_serial or (self._identity.serial if self._identity else None)
        ident = parse_identity(self.where, self.transport.query("*IDN?"))
        if want and ident.serial != want:
            raise IdentityMismatch(self.where, f"after reopen serial {ident.serial!r} answered, "
                                               f"expected {want!r}")
        return ident.serial

    #: real monotonic time (seconds) for the readback's real-time bound; tests replace it
    _monotonic = staticmethod(time.monotonic)

    def _confirm_off(self, steps) -> Tuple[bool, float, Optional[bool]]:
        """Poll output state and measured voltage for up to the bleed-down time."""
        d = self.dialect
        threshold = d.number("output_off.threshold_v")
        deadline = self.clock.now() + d.number("output_off.bleed_down_s")
        poll = d.number("output_off.poll_s")
        v, out, last_err = math.nan, None, ""
        # Real time bounds the poll too: on a virtual clock a hung wire costs a real timeout
        # per poll while the clock barely moves, and on any clock an instrument that never
        # answers must not delay the escalation (and the alarm) by more than this.
        real_deadline = self._monotonic() + d.number("output_off.bleed_down_s") + \
            2.0 * float(getattr(self.transport, "timeout", 1.0) or 1.0)
        while True:
            try:
                if not self.transport.trusted:
                    self.transport.resync()
                out = parse_bool(self.where, self.transport.query(self._cmd("get_output")))
                v = self._query_number("measure_voltage")
                if not out and math.isfinite(v) and abs(v) < threshold:
                    steps.append(("confirm off", True, f"output off, {v:g} V < {threshold:g} V"))
                    return True, v, out
            except Exception as exc:  # noqa: BLE001 - keep polling until the deadline
                last_err = str(exc)
            if self.clock.now() >= deadline or self._monotonic() >= real_deadline:
                break
            self.clock.sleep(poll)
        detail = (f"output {'unknown' if out is None else ('on' if out else 'off')}, {v:g} V"
                  + (f"; {last_err}" if last_err else ""))
        steps.append(("confirm off", False, detail))
        return False, v, out

    # -- session -----------------------------------------------------------------------------
    def abort(self) -> None:
        self.transport.abort()

    def close(self) -> None:
        self.transport.close()
