"""``fieldrun probe [--rig RIG] [--also RESOURCE ...] [--timeout S]``: what instruments answer.

Without a rig: list the VISA resources pyvisa-py finds and ask ``*IDN?`` of each (in
parallel, each with a short timeout, so one dead device does not stall the list). Serial
(ASRL) resources are listed but never written to: a serial device may not speak SCPI and
a stray line could do anything. With a rig: for each instrument the rig names, check that
it answers, that its identity is the one the rig names and that it fills its role (a
supply reports its output state, an ammeter its function, a gauge a valid pressure state,
an interlock its chain line). Instruments locked by a running fieldrun are reported and
left alone. Simulated (``sim:``) instruments are not probed.

Exit 0 when everything asked answered as expected, 2 otherwise.
"""
from __future__ import annotations

import concurrent.futures as cf
import warnings
from typing import List, Optional, Tuple

HELP = "list instruments and check that a rig's instruments answer with the right identity"
DESCRIPTION = __doc__.split("\n\n")[1].replace("``", "")  # no reST marks in --help


def add_arguments(parser) -> None:
    parser.add_argument("--rig", metavar="RIG", help="rig file whose instruments to check")
    parser.add_argument("--also", metavar="RESOURCE", action="append", default=[],
                        help="also ask *IDN? of this VISA resource (raw sockets cannot be "
                             "discovered); may be repeated")
    parser.add_argument("--scan", action="store_true",
                        help="with --rig, also list the resources found on the buses")
    parser.add_argument("--timeout", metavar="S", type=float, default=0.5,
                        help="timeout of each query in seconds (default 0.5)")
    parser.add_argument("--backend", metavar="NAME", default="@py",
                        help="VISA backend by name (default @py, pyvisa-py)")


def _is_serial_resource(res: str) -> bool:
    return res.upper().startswith("ASRL") or res.startswith("serial:") or "://" in res


def _idn(resource: str, timeout: float, backend: str) -> Tuple[str, bool, str]:
    from drivers.errors import DriverError
    from drivers.transport_visa import VisaTransport
    try:
        t = VisaTransport(resource, timeout=timeout, backend=backend)
    except DriverError as exc:
        return resource, False, exc.why
    try:
        return resource, True, t.query("*IDN?")
    except DriverError as exc:
        return resource, False, exc.why
    finally:
        t.close()


def scan(timeout: float, backend: str, extra: List[str]) -> List[Tuple[str, bool, str]]:
    """(resource, answered, identity or reason) for every resource found or given."""
    from drivers.transport_visa import list_resources
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        found = list(list_resources(backend, "?*::INSTR"))
    rows: List[Tuple[str, bool, str]] = []
    ask = []
    for res in found + [r for r in extra if r not in found]:
        if _is_serial_resource(res) and res not in extra:
            rows.append((res, True, "serial port: listed, not written to"))
        else:
            ask.append(res)
    if ask:
        with cf.ThreadPoolExecutor(max_workers=min(16, len(ask))) as pool:
            rows.extend(pool.map(lambda r: _idn(r, timeout, backend), ask))
    return rows


def check_instrument(inst, timeout: float, backend: str, state_dir: Optional[str]) -> Tuple[bool, str]:
    """Does ``inst`` (a rig instrument) answer, with the right identity, in its role?"""
    from drivers import open_instrument
    from drivers.errors import DriverError, LockHeld
    if inst.address.startswith("sim:"):
        return True, "simulated: not probed"
    role = inst.roles[0]
    opts = dict(inst.options or {})
    opts.update(timeout=timeout, backend=backend, name=inst.name, state_dir=state_dir)
    if inst.identity is not None:
        opts.update(expected_model=inst.identity.model, expected_serial=inst.identity.serial)
    try:
        drv = open_instrument(role, inst.driver, inst.address, dialect=inst.dialect, options=opts)
    except LockHeld as exc:
        return False, f"in use: {exc.why}"
    except DriverError as exc:
        return False, exc.why
    try:
        if role in ("supply", "ammeter"):
            ident = drv.identify()
            if inst.identity is not None and (ident.model, ident.serial) != (
                    inst.identity.model, inst.identity.serial):
                return False, (f"identity {ident.model}/{ident.serial}, rig names "
                               f"{inst.identity.model}/{inst.identity.serial}")
            if role == "supply":
                st = drv.state()
                return True, f"{ident.raw}; output {'ON' if st.output_on else 'off'}"
            func = drv.transport.query(drv.dialect.command("get_function"))
            return True, f"{ident.raw}; function {func}"
        if role == "gauge":
            r = drv.read()
            if r.state == "no-answer":
                return False, f"gauge gave no usable answer ({drv.last_problem})"
            return True, f"pressure state {r.state}" + (f", {r.pa:.3g} Pa" if r.pa == r.pa else "")
        closed = drv.chain_closed()
        return True, f"interlock chain {'closed' if closed else 'OPEN'}"
    except DriverError as exc:
        return False, exc.why
    finally:
        drv.close()


def run(args) -> int:
    from drivers.session import check_timeout
    from drivers.transport_visa import check_backend
    from sequencer.errors import RefusedError
    try:
        check_timeout("probe", args.timeout)
        check_backend(args.backend)
    except Exception as exc:  # DriverError: one line, exit 2
        raise RefusedError(str(exc)) from None
    ok = True
    if args.rig is None or args.scan:
        rows = scan(args.timeout, args.backend, list(args.also))
        if not rows:
            print("no VISA resources found (raw sockets are never discoverable: use --also)")
        for res, good, text in rows:
            ok &= good
            print(f"{res:40s} {'' if good else 'NO ANSWER: '}{text}")
    elif args.also:
        for res, good, text in (_idn(r, args.timeout, args.backend) for r in args.also):
            ok &= good
            print(f"{res:40s} {'' if good else 'NO ANSWER: '}{text}")
    if args.rig is not None:
        from sequencer.rig import load_rig
        rig = load_rig(args.rig)
        instruments = list(rig.instruments)
        with cf.ThreadPoolExecutor(max_workers=max(1, min(8, len(instruments)))) as pool:
            results = list(pool.map(lambda i: check_instrument(i, args.timeout, args.backend,
                                                               rig.state_dir), instruments))
        for inst, (good, text) in zip(instruments, results):
            ok &= good
            print(f"{inst.name:10s} {'/'.join(inst.roles):10s} {inst.address:36s} "
                  f"{'ok' if good else 'FAIL'}: {text}")
    return 0 if ok else 2
