"""The rig file: what hardware is on the stand and what it may never exceed.

A rig file is YAML (see ``protocols/sim-rig.yaml`` and ``protocols/rig-stand-b.yaml``)::

    rig: stand-B                     # a name (optional; default: the file name)
    sample_id: KL-F12                # the sample mounted now (the protocol never names it)
    polarity: negative               # sign of the supply output: positive | negative
    ammeter: {electrode: anode, sign: 1}
    gap: "500 um"                    # anode-cathode gap (needed for field levels)
    anode: flat                      # flat | sphere | cylinder | mesh, or {shape:, radius:}
    series_resistance: "1 Mohm"      # the ballast resistor
    host_loss: supply-timeout        # supply-timeout | heartbeat | none
    host_loss_timeout: "5 s"
    hard_limits: {voltage_max: "2 kV", current_max: "100 uA", power_max: "0.5 W",
                  pressure_arm_max: "1e-4 Pa", pressure_run_max: "1e-3 Pa"}
    instruments:
      hv:  {role: supply, driver: scpi-supply, address: "TCPIP::192.0.2.10::5025::SOCKET",
            dialect: generic-scpi-supply, identity: {model: "...", serial: "..."}}
      ...
    notify: {on_trip: ["notify-send", "fieldrun", "trip"]}
    state_dir: .fieldrun-state
    simulation: {seed: 7, cathode: {}}   # only for simulated rigs; passed through

Everything is checked in one pass; every problem is reported at its line.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any, Dict, Mapping, Optional, Tuple

from .errors import ProtocolError
from .limits import PARAMS
from .protocol import reduce_frozen
from .yamlsafe import Fields, Node, did_you_mean, load, load_text

ROLES = ("supply", "ammeter", "gauge", "interlock")
REQUIRED_ROLES = ("supply", "ammeter", "gauge")
HOST_LOSS = ("supply-timeout", "heartbeat", "none")
ANODE_SHAPES = ("flat", "sphere", "cylinder", "mesh")
SIM_NAMES = ("supply", "ammeter", "gauge", "interlock")
# driver names a rig file may give, per role (the drivers layer maps them to its own)
DRIVERS_FOR_ROLE = {
    "supply": ("scpi-supply", "scpi"),
    "ammeter": ("scpi-ammeter", "scpi"),
    "gauge": ("ascii-gauge", "ascii"),
    "interlock": ("serial-lines", "lines"),
}
HOST_LOSS_TIMEOUT_DEFAULT = 5.0     # s, common practice, no source
STATE_DIR_DEFAULT = ".fieldrun-state"

# hard limit name -> (watchdog parameter it bounds, required?)
HARD_LIMITS = {
    "voltage_max": ("voltage_max", True),
    "current_max": ("current_max", True),
    "power_max": ("power_max", False),
    "pressure_arm_max": ("pressure_arm_max", False),
    "pressure_run_max": ("pressure_max", False),
}

_VISA_RE = re.compile(r"^(TCPIP\d*|GPIB\d*|USB\d*|ASRL\d*|VXI\d*|GPIB-VXI\d*|PXI\d*)::\S+$",
                      re.IGNORECASE)
_SERIAL_RE = re.compile(r"^serial:(/dev/[\w./-]+|COM\d+)(\?baud=\d{3,7})?$")
_URL_RE = re.compile(r"^(socket://[\w.-]+:\d{1,5}|loop://\S*|rfc2217://[\w.-]+:\d{1,5})$")
_SIM_RE = re.compile(r"^sim:(\w[\w-]*)$")
ADDRESS_HINT = ("a VISA resource (TCPIP::host::5025::SOCKET, GPIB0::5::INSTR, "
                "USB0::...::INSTR, ASRL1::INSTR), serial:/dev/ttyUSB0?baud=9600, "
                "socket://host:port, loop://, or sim:supply|ammeter|gauge|interlock")


@dataclass(frozen=True)
class Identity:
    model: str
    serial: str


@dataclass(frozen=True)
class Instrument:
    name: str
    roles: Tuple[str, ...]
    driver: str
    address: str
    dialect: Optional[str] = None
    identity: Optional[Identity] = None
    options: Mapping[str, Any] = field(default_factory=dict)
    line: int = 0

    def __post_init__(self):
        object.__setattr__(self, "options", MappingProxyType(dict(self.options)))

    __reduce__ = reduce_frozen

    @property
    def simulated(self) -> bool:
        return self.address.startswith("sim:")


@dataclass(frozen=True)
class Notify:
    on_trip: Tuple[str, ...] = ()
    on_end: Tuple[str, ...] = ()
    on_unsafe: Tuple[str, ...] = ()


@dataclass(frozen=True)
class Rig:
    name: str
    sample_id: str
    polarity: int                       # +1 or -1
    ammeter_electrode: str              # "anode" | "cathode"
    ammeter_sign: int                   # +1 or -1: reading * sign = emission current
    gap_m: Optional[float]
    anode_shape: str
    anode_radius_m: Optional[float]
    series_resistance_ohm: float
    host_loss: str
    host_loss_timeout_s: float
    voltage_max: float
    current_max: float
    power_max: float
    pressure_arm_max: float
    pressure_run_max: float
    instruments: Tuple[Instrument, ...]
    notify: Notify = Notify()
    state_dir: str = STATE_DIR_DEFAULT
    simulation: Optional[Mapping[str, Any]] = None
    file: str = ""
    lines: Mapping[str, int] = field(default_factory=dict)   # key -> line, for messages

    def __post_init__(self):
        object.__setattr__(self, "lines", MappingProxyType(dict(self.lines)))

    __reduce__ = reduce_frozen

    def instrument_for(self, role: str) -> Optional[Instrument]:
        for inst in self.instruments:
            if role in inst.roles:
                return inst
        return None

    @property
    def all_simulated(self) -> bool:
        return bool(self.instruments) and all(i.simulated for i in self.instruments)

    def hard_limits(self) -> Dict[str, float]:
        """Watchdog parameter name -> the rig's bound on it."""
        return {"voltage_max": self.voltage_max, "current_max": self.current_max,
                "power_max": self.power_max, "pressure_arm_max": self.pressure_arm_max,
                "pressure_max": self.pressure_run_max}


TOP_KEYS = ("rig", "sample_id", "polarity", "ammeter", "gap", "anode", "series_resistance",
            "host_loss", "host_loss_timeout", "hard_limits", "instruments", "notify",
            "state_dir", "simulation")
INSTRUMENT_KEYS = ("role", "driver", "address", "dialect", "identity", "options")


def _dialect_problem(name: str, role: str) -> Optional[str]:
    """None when the drivers layer can load dialect ``name`` for ``role``, else why not.
    (The interlock role has no dialect.)"""
    if role == "interlock":
        return "an interlock takes no dialect"
    try:
        from drivers.dialect import load_dialect
    except ImportError:          # drivers layer absent: nothing to check against
        return None
    try:
        load_dialect(name, role)
    except Exception as exc:     # DialectError and friends: report, never crash check
        return str(getattr(exc, "why", None) or exc)
    return None


def _driver_options() -> Tuple[str, ...]:
    """The instrument options the drivers layer accepts (empty when unknown)."""
    try:
        from drivers import factory
    except ImportError:
        return ()
    return tuple(sorted(getattr(factory, "_OPTIONS", ()) or ()))


# keys of the simulated cathode (simulators/cathode.py) that restate a rig-file fact
_SIM_RESTATED = {"gap_m": ("gap", "m"), "series_resistance_ohm": ("series_resistance", "ohm")}


def _check_simulation_matches(f: Fields, snode: Node, gap: Optional[float],
                              series: Optional[float]) -> None:
    """A simulated cathode that restates the gap or the ballast must agree with the rig
    file, or the simulated fibre would not be the rig the limits were checked against."""
    cnode = snode.get("cathode")
    if cnode is None or cnode.kind != "map":
        return
    rig_values = {"gap_m": gap, "series_resistance_ohm": series}
    for key, (rig_key, unit) in _SIM_RESTATED.items():
        vnode = cnode.get(key)
        if vnode is None or rig_values[key] is None or vnode.kind != "scalar":
            continue
        try:
            v = float(vnode.value)
        except ValueError:
            continue
        if abs(v - rig_values[key]) > 1e-9 * max(abs(v), abs(rig_values[key])):
            f.add(vnode, f"simulation: cathode: {key} {v:g} {unit} disagrees with the rig's "
                         f"{rig_key} {rig_values[key]:g} {unit}",
                  f"make them equal, or leave {key} out")


def looks_like_rig(root: Node) -> bool:
    return root.kind == "map" and "instruments" in root.keys()


def _read_instrument(f: Fields, key: Node, node: Node) -> Optional[Instrument]:
    name = key.value
    what = f"instrument {name!r}"
    keys = f.mapping(node, what, INSTRUMENT_KEYS, required=("role", "driver", "address"))
    if keys is None:
        return None
    roles: list = []
    rnode = keys.get("role")
    if rnode is not None:
        items = rnode.value if rnode.kind == "seq" else [rnode]
        if not items:
            f.add(rnode, f"{what}: role is empty", "one or more of: " + ", ".join(ROLES))
        for item in items:
            r = f.choice(item, f"{what}: role", ROLES)
            if r is not None:
                if r in roles:
                    f.add(item, f"{what}: role {r!r} given twice", "")
                roles.append(r)
    driver = f.text(keys.get("driver"), f"{what}: driver", pattern=r"[a-z0-9][a-z0-9_-]{0,63}",
                    hint="a driver name such as scpi-supply (lower case, digits, - and _)")
    address = f.text(keys.get("address"), f"{what}: address")
    if address is not None:
        sim = _SIM_RE.match(address)
        if sim and sim.group(1) not in SIM_NAMES:
            f.add(keys["address"], f"{what}: unknown simulated instrument {address!r}",
                  "sim:supply, sim:ammeter, sim:gauge or sim:interlock")
            address = None
        elif not (sim or _VISA_RE.match(address) or _SERIAL_RE.match(address)
                  or _URL_RE.match(address)):
            f.add(keys["address"], f"{what}: address {address!r} is not an address fieldrun "
                                   "knows", ADDRESS_HINT)
            address = None
    if driver is not None and roles:
        for r in roles:
            if driver not in DRIVERS_FOR_ROLE[r]:
                f.add(keys["driver"], f"{what}: driver {driver!r} cannot fill the {r!r} role",
                      "use " + " or ".join(DRIVERS_FOR_ROLE[r]))
                driver = None
                break
    dialect = None
    if "dialect" in keys:
        dialect = f.text(keys.get("dialect"), f"{what}: dialect",
                         pattern=r"[\w][\w./-]{0,200}",
                         hint="a built-in dialect name, or a path to a dialect .yaml file")
        if dialect is not None:
            for r in roles:
                problem = _dialect_problem(dialect, r)
                if problem:
                    f.add(keys["dialect"], f"{what}: dialect {dialect!r}: {problem}", "")
                    dialect = None
                    break
    identity = None
    if "identity" in keys:
        ik = f.mapping(keys["identity"], f"{what}: identity", ("model", "serial"),
                       required=("model", "serial"))
        if ik:
            model = f.text(ik.get("model"), f"{what}: identity model")
            serial = f.text(ik.get("serial"), f"{what}: identity serial")
            if model is not None and serial is not None:
                identity = Identity(model, serial)
    elif address is not None and not address.startswith("sim:"):
        f.add(key, f"{what} needs 'identity' (model and serial the instrument must report)",
              "arming refuses an instrument whose *IDN? does not match")
    options: Dict[str, Any] = {}
    if "options" in keys:
        if keys["options"].kind != "map":
            f.add(keys["options"], f"{what}: options must be a mapping", "")
        else:
            known = _driver_options()
            if known:
                for k, _ in keys["options"].items():
                    if k.value not in known:
                        f.add(k, f"{what}: unknown option {k.value!r}",
                              did_you_mean(k.value, known) or
                              "known options: " + ", ".join(sorted(known)))
            options = f.plain(keys["options"], f"{what}: options")
    if driver is None or address is None or not roles:
        return None
    return Instrument(name, tuple(roles), driver, address, dialect, identity, options,
                      node.line)


def parse_rig(root: Node, file: str = "<rig>") -> Rig:
    """Check and read a rig tree; raise one ``ProtocolError`` with every problem."""
    f = Fields(file)
    f.refuse_other_kind(root, "steps", "instruments",
                        "this is a protocol (it lists 'steps'), not a rig file",
                        "the rig file is the one listing 'instruments': "
                        "fieldrun run PROTOCOL --rig RIG")
    top = f.mapping(root, "rig file", TOP_KEYS,
                    required=("sample_id", "polarity", "ammeter", "series_resistance",
                              "host_loss", "hard_limits", "instruments"))
    if top is None:
        f.raise_if_any()
        raise ProtocolError([])  # pragma: no cover
    lines = {k: v.line for k, v in top.items()}
    default_name = Path(file).stem if file and not file.startswith("<") else "rig"
    name = f.text(top.get("rig"), "rig", pattern=r"[\w][\w .+-]{0,79}",
                  hint="letters, digits, spaces, '.', '+', '-' and '_'") if "rig" in top \
        else default_name
    sample_id = f.text(top.get("sample_id"), "sample_id", pattern=r"[\w][\w.+-]{0,63}",
                       hint="letters, digits, '.', '+', '-' and '_', e.g. KL-F12")
    pol = f.choice(top.get("polarity"), "polarity", ("positive", "negative"))
    polarity = {"positive": 1, "negative": -1}.get(pol or "", 1)
    electrode, sign = "anode", 1
    am = f.mapping(top.get("ammeter"), "ammeter", ("electrode", "sign"),
                   required=("electrode", "sign"))
    if am:
        electrode = f.choice(am.get("electrode"), "ammeter: electrode",
                             ("anode", "cathode")) or "anode"
        snode = am.get("sign")
        if snode is not None:
            s = f.integer(snode, "ammeter: sign")
            if s is not None and s not in (1, -1):
                f.add(snode, "ammeter: sign must be 1 or -1",
                      "the factor that makes the emission current positive")
            elif s is not None:
                sign = s
    gap = f.quantity(top.get("gap"), "gap", "m", positive=True) if "gap" in top else None
    shape, radius = "flat", None
    anode = top.get("anode")
    if anode is not None:
        if anode.kind == "map":
            ak = f.mapping(anode, "anode", ("shape", "radius"), required=("shape",))
            if ak:
                shape = f.choice(ak.get("shape"), "anode: shape", ANODE_SHAPES) or "flat"
                if "radius" in ak:
                    radius = f.quantity(ak["radius"], "anode: radius", "m", positive=True)
                if shape in ("sphere", "cylinder") and "radius" not in ak:
                    f.add(anode, f"a {shape} anode needs 'radius'", 'e.g. radius: "2 mm"')
        else:
            shape = f.choice(anode, "anode", ANODE_SHAPES) or "flat"
            if shape in ("sphere", "cylinder"):
                f.add(anode, f"a {shape} anode needs a radius",
                      f'write anode: {{shape: {shape}, radius: "2 mm"}}')
    series = f.quantity(top.get("series_resistance"), "series_resistance", "ohm",
                        positive=True)
    host_loss = f.choice(top.get("host_loss"), "host_loss", HOST_LOSS)
    hlt = HOST_LOSS_TIMEOUT_DEFAULT
    if "host_loss_timeout" in top:
        v = f.quantity(top["host_loss_timeout"], "host_loss_timeout", "s", positive=True,
                       at_most=600.0)
        hlt = v if v is not None else hlt
    hard: Dict[str, float] = {}
    hk = f.mapping(top.get("hard_limits"), "hard_limits", list(HARD_LIMITS),
                   required=[k for k, (_, req) in HARD_LIMITS.items() if req])
    for key, (param, _) in HARD_LIMITS.items():
        if hk and key in hk:
            v = f.quantity(hk[key], f"hard_limits: {key}", PARAMS[param].unit, positive=True)
            if v is not None:
                hard[key] = v
        else:
            hard[key] = PARAMS[param].default
    if hk and "pressure_arm_max" in hard and "pressure_run_max" in hard \
            and hard["pressure_arm_max"] > hard["pressure_run_max"]:
        f.add(hk.get("pressure_arm_max", top["hard_limits"]),
              "hard_limits: pressure_arm_max is above pressure_run_max",
              "arming needs a better vacuum than running")
    if series is not None and "voltage_max" in hard and "current_max" in hard \
            and series * hard["current_max"] >= hard["voltage_max"]:
        f.add(top["series_resistance"],
              f"series_resistance {series:g} ohm times current_max {hard['current_max']:g} A "
              f"is {series * hard['current_max']:g} V, at or above voltage_max "
              f"{hard['voltage_max']:g} V", "the ballast would take the whole supply; check "
                                            "the unit (kohm where Mohm?)")
    instruments = []
    inode = top.get("instruments")
    if inode is not None:
        if inode.kind != "map" or not inode.items():
            f.add(inode, "instruments must be a mapping of instrument names to settings",
                  "e.g. instruments: {hv: {role: supply, driver: ..., address: ...}}")
        else:
            for k, v in inode.items():
                inst = _read_instrument(f, k, v)
                if inst is not None:
                    instruments.append(inst)
            filled: Dict[str, str] = {}
            for inst in instruments:
                for r in inst.roles:
                    if r in filled:
                        f.add(inode, f"role {r!r} is filled by both {filled[r]!r} and "
                                     f"{inst.name!r}", "one instrument per role")
                    filled[r] = inst.name
            if len(instruments) == len(inode.items()):
                for r in REQUIRED_ROLES:
                    if r not in filled:
                        f.add(inode, f"no instrument fills the {r!r} role", "")
                if host_loss == "heartbeat" and "interlock" not in filled:
                    f.add(top.get("host_loss"), "host_loss heartbeat needs an instrument with "
                                                "the 'interlock' role", "")
    notify = Notify()
    if "notify" in top:
        nk = f.mapping(top["notify"], "notify", ("on_trip", "on_end", "on_unsafe"))
        if nk:
            notify = Notify(*(f.argv(nk.get(k), f"notify: {k}") or ()
                              for k in ("on_trip", "on_end", "on_unsafe")))
    state_dir = STATE_DIR_DEFAULT
    if "state_dir" in top:
        state_dir = f.text(top["state_dir"], "state_dir") or STATE_DIR_DEFAULT
    simulation = None
    if "simulation" in top:
        snode = top["simulation"]
        if snode.kind != "map":
            f.add(snode, "simulation must be a mapping", "e.g. simulation: {seed: 7}")
        else:
            seed = snode.get("seed")
            if seed is not None:
                f.integer(seed, "simulation: seed", lo=0, hi=2**63 - 1)
            simulation = f.plain(snode, "simulation")
            _check_simulation_matches(f, snode, gap, series)
            if instruments and not all(i.simulated for i in instruments):
                f.add(snode, "a 'simulation' block belongs to a rig of simulated (sim:) "
                             "instruments only", "remove it, or use sim: addresses")
    if instruments and any(i.simulated for i in instruments) \
            and not all(i.simulated for i in instruments):
        f.add(inode, "simulated (sim:) and real instruments are mixed in one rig",
              "a rig is either all simulated or all real")
    f.raise_if_any()
    return Rig(name=name or default_name, sample_id=sample_id or "", polarity=polarity,
               ammeter_electrode=electrode, ammeter_sign=sign, gap_m=gap,
               anode_shape=shape, anode_radius_m=radius,
               series_resistance_ohm=series if series is not None else 0.0,
               host_loss=host_loss or "none", host_loss_timeout_s=hlt,
               voltage_max=hard["voltage_max"], current_max=hard["current_max"],
               power_max=hard["power_max"], pressure_arm_max=hard["pressure_arm_max"],
               pressure_run_max=hard["pressure_run_max"], instruments=tuple(instruments),
               notify=notify, state_dir=state_dir, simulation=simulation, file=file,
               lines=lines)


def load_rig(path) -> Rig:
    root, _ = load(path)
    return parse_rig(root, str(path))


def rig_from_text(text: str, file: str = "<rig>") -> Rig:
    return parse_rig(load_text(text, file), file)
