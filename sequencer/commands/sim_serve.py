"""``fieldrun sim-serve``: serve the simulated stand's instruments over TCP, one port each,
so the real drivers reach them through pyvisa-py as LAN instruments
(``TCPIP::127.0.0.1::PORT::SOCKET``) or through pyserial (``socket://127.0.0.1:PORT``).

Binds 127.0.0.1 unless ``--bind`` says otherwise (with a printed warning: the simulated
instruments have no authentication). Ports are chosen free by the system and printed.
Lines are capped (``--max-line``); a client that sends something that is not an
instrument command (a browser's HTTP request, binary junk, an over-long line) is dropped;
each instrument takes ``max_clients`` connections (one by default, like many LAN
instruments). Ctrl-C or SIGTERM stops every server cleanly.

The clock is wall time, optionally running ``--speed`` times faster, so bleed-down, slew
and the cathode's own dynamics happen in (scaled) real time.
"""
from __future__ import annotations

import ipaddress
import signal
import sys
import threading
from pathlib import Path
from typing import Callable, Dict, Optional

HELP = "serve the simulated instruments of a rig file over TCP, one port each"
DESCRIPTION = (
    "Serve the simulated supply, ammeter, gauge and interlock lines of a simulated rig "
    "file over raw TCP sockets on 127.0.0.1 (ports chosen free and printed as VISA "
    "resource strings) until Ctrl-C. Nothing real is energised.")

ROLES = ("supply", "ammeter", "gauge", "interlock")
MAX_RIG_BYTES = 1 << 20


class ServeError(Exception):
    """A user mistake: one line, exit 2."""


def add_arguments(parser) -> None:
    parser.add_argument("--rig", metavar="FILE",
                        help="simulated rig file (its 'simulation:' block); default: "
                             "built-in defaults")
    parser.add_argument("--bind", metavar="ADDR", default="127.0.0.1",
                        help="address to listen on (default 127.0.0.1; anything else "
                             "exposes the instruments to the network)")
    parser.add_argument("--speed", type=float, default=1.0, metavar="X",
                        help="simulated seconds per real second (default 1)")
    parser.add_argument("--seed", type=int, default=None,
                        help="seed of the simulation (default: the rig file's, else 0)")
    parser.add_argument("--max-line", type=int, default=4096, metavar="BYTES",
                        help="longest accepted command line (default 4096)")
    parser.add_argument("--max-clients", type=int, default=None, metavar="N",
                        help="connections per instrument (default: 1, or as the rig's "
                             "quirks say)")


def load_rig_dict(path: Optional[str]) -> dict:
    """The rig file as a plain dict (safe YAML, size-capped)."""
    if not path:
        return {}
    p = Path(path)
    if not p.is_file():
        raise ServeError(f"{path}: no such rig file")
    if p.stat().st_size > MAX_RIG_BYTES:
        raise ServeError(f"{path}: larger than {MAX_RIG_BYTES} bytes, not a rig file")
    try:
        from sequencer.rig import load_rig   # the project's checked rig reader
    except ImportError:
        load_rig = None
    if load_rig is not None:
        return rig_to_dict(load_rig(p))      # ProtocolError: one line per problem, exit 2
    import yaml
    try:
        data = yaml.safe_load(p.read_text(encoding="utf-8"))
    except (yaml.YAMLError, UnicodeDecodeError) as exc:
        raise ServeError(f"{path}: not valid YAML ({str(exc).splitlines()[0]})") from None
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise ServeError(f"{path}: a rig file is a mapping of keys")
    for name, entry in (data.get("instruments") or {}).items():
        addr = entry.get("address") if isinstance(entry, dict) else None
        if addr is not None and not str(addr).startswith("sim:"):
            raise ServeError(f"{path}: instrument '{name}' is not simulated ({addr}); "
                             "sim-serve serves simulated rigs only")
    return data


def rig_to_dict(rig) -> dict:
    """What ``SimulatedStand`` needs from a checked ``sequencer.rig.Rig``."""
    if not rig.all_simulated:
        raise ServeError(f"{rig.file or 'rig'}: not every instrument is simulated (sim:); "
                         "sim-serve serves simulated rigs only")
    instruments = {}
    for inst in rig.instruments:
        entry = {"role": list(inst.roles), "address": inst.address}
        if inst.identity is not None:
            entry["identity"] = {"model": inst.identity.model, "serial": inst.identity.serial}
        instruments[inst.name] = entry
    return {"simulation": dict(rig.simulation or {}), "instruments": instruments,
            "ammeter": {"sign": rig.ammeter_sign}}


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


class _RealTime:
    """Hands an instrument to the loopback server, which sleeps ``reply_delay`` in real
    seconds, when the stand's clock runs ``speed`` times faster than real time."""

    def __init__(self, inst, speed: float):
        self._inst = inst
        self._speed = speed

    def handle(self, line):
        return self._inst.handle(line)

    def reply_delay(self, line):
        return self._inst.reply_delay(line) / self._speed

    def disconnect(self):
        self._inst.disconnect()


class Serving:
    """The running servers of one stand; ``stop()`` ends them all."""

    def __init__(self, stand, servers: Dict[str, object]):
        self.stand = stand
        self.servers = servers

    def resources(self) -> Dict[str, str]:
        return {role: srv.resource for role, srv in self.servers.items()}

    def stop(self) -> None:
        for srv in self.servers.values():
            srv.stop()


def start(rig: dict, bind: str = "127.0.0.1", speed: float = 1.0, seed: Optional[int] = None,
          max_line: int = 4096, max_clients: Optional[int] = None, clock=None) -> Serving:
    """Build the stand on a wall clock and start one loopback server per instrument."""
    from simulators.loopback import LoopbackServer
    from simulators.quirks import QuirkConfigError
    from simulators.stand import ScaledClock, SimulatedStand

    if speed <= 0:
        raise ServeError("--speed must be positive")
    if max_line < 16:
        raise ServeError("--max-line must be at least 16 bytes")
    if clock is None:
        if speed == 1.0:
            from drivers.clock import WallClock
            clock = WallClock()
        else:
            clock = ScaledClock(speed)
    try:
        stand = SimulatedStand(rig, clock, seed)
    except (QuirkConfigError, ValueError, TypeError) as exc:
        raise ServeError(f"simulation settings: {exc}") from None
    servers: Dict[str, object] = {}
    try:
        for role in ROLES:
            inst = stand.interpreter(role)
            n = max_clients if max_clients is not None else (1 if inst.quirks.single_client else 4)
            served = inst if speed == 1.0 else _RealTime(inst, speed)
            servers[role] = LoopbackServer(served, host=bind, port=0, max_line=max_line,
                                           max_clients=n).start()
    except OSError as exc:
        for srv in servers.values():
            srv.stop()
        raise ServeError(f"cannot listen on {bind}: {exc.strerror or exc}") from None
    return Serving(stand, servers)


def banner(serving: Serving, bind: str, out: Callable[[str], None]) -> None:
    stand = serving.stand
    for role, srv in serving.servers.items():
        inst = stand.interpreter(role)
        extra = f"   (pyserial: socket://{bind}:{srv.port})" if role in ("gauge", "interlock") else ""
        out(f"{role:<10} {srv.resource}   {inst.identity()}{extra}")
    out("serving simulated instruments; Ctrl-C stops")


def run(args) -> int:
    err = sys.stderr
    if not is_loopback(args.bind):
        print(f"fieldrun sim-serve: WARNING: binding {args.bind} makes the simulated "
              "instruments reachable from the network; they have no authentication",
              file=err)
    try:
        rig = load_rig_dict(args.rig)
        serving = start(rig, bind=args.bind, speed=args.speed, seed=args.seed,
                        max_line=args.max_line, max_clients=args.max_clients)
    except ServeError as exc:
        print(f"fieldrun sim-serve: {exc}", file=err)
        return 2
    stop = threading.Event()

    def _on_signal(signum, frame):
        stop.set()

    old = {}
    for sig in (signal.SIGINT, signal.SIGTERM):
        try:
            old[sig] = signal.signal(sig, _on_signal)
        except ValueError:      # not the main thread (tests): Ctrl-C is not ours
            pass
    try:
        banner(serving, args.bind, lambda s: print(s, flush=True))   # after the handlers
        while not stop.wait(0.2):
            pass
    except KeyboardInterrupt:
        pass
    finally:
        for sig, handler in old.items():
            signal.signal(sig, handler)
        serving.stop()
    print("fieldrun sim-serve: stopped", file=err)
    return 0
