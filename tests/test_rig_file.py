"""The rig file: what is read from protocols/sim-rig.yaml and rig-stand-b.yaml, and the
rules between its fields. Expected values are the ones written in those files; the ballast
sanity rule is Ohm's law (V = I R) against the rig's own voltage_max.
"""
from pathlib import Path

import pytest

from sequencer.errors import ProtocolError
from sequencer.rig import load_rig, rig_from_text

ROOT = Path(__file__).resolve().parents[1]
SIM_TEXT = (ROOT / "protocols" / "sim-rig.yaml").read_text()


def test_the_simulated_rig():
    rig = load_rig(ROOT / "protocols" / "sim-rig.yaml")
    assert rig.sample_id == "KL-F12"
    assert rig.polarity == 1 and rig.ammeter_electrode == "anode" and rig.ammeter_sign == 1
    assert rig.gap_m == pytest.approx(500e-6)
    assert rig.anode_shape == "flat"
    assert rig.series_resistance_ohm == pytest.approx(1e6)
    assert rig.host_loss == "supply-timeout" and rig.host_loss_timeout_s == 5.0
    assert rig.voltage_max == 1500.0 and rig.current_max == pytest.approx(100e-6)
    assert rig.all_simulated
    assert {i.address for i in rig.instruments} == {"sim:supply", "sim:ammeter", "sim:gauge",
                                                    "sim:interlock"}
    assert rig.instrument_for("gauge").name == "gauge"
    assert rig.simulation["seed"] == 7
    assert rig.simulation["cathode"] == {"gap_m": 5e-4, "series_resistance_ohm": 1e6}
    assert rig.notify.on_trip[0] == "echo"
    assert rig.state_dir == ".fieldrun-state"
    # the ballast at the current ceiling: 1 Mohm x 100 uA = 100 V, under 10 % of 1.5 kV
    assert rig.series_resistance_ohm * rig.current_max <= 0.1 * rig.voltage_max


def test_the_real_stand_example():
    rig = load_rig(ROOT / "protocols" / "rig-stand-b.yaml")
    assert rig.polarity == -1 and not rig.all_simulated
    assert rig.anode_shape == "sphere" and rig.anode_radius_m == pytest.approx(2.5e-3)
    hv = rig.instrument_for("supply")
    assert hv.identity.model == "HV-5000N" and hv.identity.serial == "KL0042"
    assert rig.instrument_for("ammeter").options == {"timeout": 2.0}
    assert rig.instrument_for("ammeter").identity.serial == "0811337"   # leading 0 kept
    assert rig.host_loss == "heartbeat" and rig.instrument_for("interlock") is not None
    assert rig.simulation is None


def _bad(text):
    with pytest.raises(ProtocolError) as exc:
        rig_from_text(text, "rig.yaml")
    return exc.value.problems


def test_missing_required_role():
    text = SIM_TEXT.replace("  gauge:\n    role: gauge\n    driver: ascii-gauge\n"
                            "    address: \"sim:gauge\"\n", "")
    assert any("'gauge' role" in p.message for p in _bad(text))


def test_one_instrument_may_fill_several_roles():
    text = SIM_TEXT.replace("  hv:\n    role: supply\n    driver: scpi-supply",
                            "  hv:\n    role: [supply, ammeter]\n    driver: scpi")
    text = text.replace("  pico:\n    role: ammeter\n    driver: scpi-ammeter\n"
                        "    address: \"sim:ammeter\"\n", "")
    rig = rig_from_text(text, "rig.yaml")
    assert rig.instrument_for("ammeter").name == "hv"


def test_two_instruments_for_one_role():
    text = SIM_TEXT.replace("  pico:\n    role: ammeter\n    driver: scpi-ammeter",
                            "  pico:\n    role: supply\n    driver: scpi")
    msgs = [p.message for p in _bad(text)]
    assert any("filled by both" in m for m in msgs)


def test_simulated_and_real_are_not_mixed():
    text = SIM_TEXT.replace('address: "sim:gauge"', 'address: "serial:/dev/ttyUSB0?baud=9600"')
    msgs = [p.message for p in _bad(text)]
    assert any("mixed" in m for m in msgs)


def test_options_refuse_yaml11_booleans():
    text = SIM_TEXT.replace("    driver: scpi-ammeter\n",
                            "    driver: scpi-ammeter\n    options: {lock: off}\n")
    (p,) = _bad(text)
    assert "'off'" in p.message and "boolean" in p.message


@pytest.mark.parametrize("address", ["TCPIP::127.0.0.1::5025::SOCKET", "GPIB0::5::INSTR",
                                     "USB0::0x1234::0x5678::SN1::INSTR", "ASRL1::INSTR",
                                     "serial:/dev/ttyUSB0?baud=9600", "serial:COM3",
                                     "socket://127.0.0.1:5025", "loop://"])
def test_address_forms_accepted(address):
    text = (ROOT / "protocols" / "rig-stand-b.yaml").read_text().replace(
        '"GPIB0::22::INSTR"', f'"{address}"')
    assert rig_from_text(text, "rig.yaml").instrument_for("ammeter").address == address


def test_pressure_arm_above_run_is_refused():
    text = SIM_TEXT.replace('pressure_arm_max: "1e-4 Pa"', 'pressure_arm_max: "1e-2 Pa"')
    assert any("pressure_arm_max" in p.message for p in _bad(text))


def test_driver_must_fit_the_role():
    text = SIM_TEXT.replace("driver: ascii-gauge", "driver: scpi-supply")
    assert any("cannot fill the 'gauge' role" in p.message for p in _bad(text))


def test_dialect_must_exist_and_fit_the_role():
    # drivers/dialects holds generic-scpi-supply, generic-scpi-picoammeter, generic-ascii-gauge
    stand_b = (ROOT / "protocols" / "rig-stand-b.yaml").read_text()
    wrong_role = stand_b.replace("dialect: generic-scpi-picoammeter",
                                 "dialect: generic-scpi-supply")
    assert any("dialect" in p.message for p in _bad(wrong_role))
    missing = stand_b.replace("dialect: generic-ascii-gauge", "dialect: no-such-gauge")
    assert any("no-such-gauge" in p.message for p in _bad(missing))


def test_unknown_instrument_option_gets_did_you_mean():
    stand_b = (ROOT / "protocols" / "rig-stand-b.yaml").read_text()
    (p,) = _bad(stand_b.replace("options: {timeout: 2.0}", "options: {timout: 2.0}"))
    assert "timout" in p.message and "'timeout'" in p.hint


def test_simulated_cathode_must_agree_with_the_rig():
    # the simulated fibre must sit behind the ballast and gap the limits were checked for
    (p,) = _bad(SIM_TEXT.replace("series_resistance_ohm: 1.0e+6", "series_resistance_ohm: 1.0e+5"))
    assert "disagrees" in p.message and "series_resistance" in p.message


def test_sphere_anode_needs_a_radius():
    assert any("radius" in p.message for p in _bad(SIM_TEXT.replace("anode: flat",
                                                                    "anode: sphere")))


def test_protocol_rig_and_plan_pickle():
    # campaign workers (dask, multiprocessing) receive these by pickling; the round trip
    # must give equal values
    import pickle
    from sequencer.compiler import compile_plan
    from sequencer.protocol import load_protocol
    rig = load_rig(ROOT / "protocols" / "sim-rig.yaml")
    proto = load_protocol(ROOT / "protocols" / "lifetime-10uA.yaml")
    plan = compile_plan(proto, rig)
    for obj in (rig, proto, plan):
        assert pickle.loads(pickle.dumps(obj)) == obj
