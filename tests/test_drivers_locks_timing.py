"""Resource locks (one fieldrun process per instrument; simulated stands never contend) and
the timing budget of one sample."""
import os
import subprocess
import sys
import textwrap

import pytest

from drivers import locks
from drivers.errors import LockHeld
from drivers.timing import PeriodTooShort, check_period, dialect_budget as sample_budget, serial_time_s


def test_a_second_lock_on_the_same_resource_is_refused(tmp_path):
    a = locks.ResourceLock("GPIB0::5::INSTR", tmp_path).acquire()
    with pytest.raises(LockHeld, match="in use by pid"):
        locks.ResourceLock("GPIB0::5::INSTR", tmp_path).acquire()
    other = locks.ResourceLock("GPIB0::6::INSTR", tmp_path).acquire()   # another instrument
    a.release()
    locks.ResourceLock("GPIB0::5::INSTR", tmp_path).acquire().release()
    other.release()


def test_another_process_cannot_take_a_held_instrument(tmp_path):
    h = locks.hold("TCPIP::127.0.0.1::5025::SOCKET", tmp_path)
    code = textwrap.dedent(f"""
        import sys
        from drivers import locks
        from drivers.errors import LockHeld
        try:
            locks.hold("TCPIP::127.0.0.1::5025::SOCKET", {str(tmp_path)!r})
        except LockHeld:
            sys.exit(7)
        sys.exit(0)
    """)
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    rc = subprocess.run([sys.executable, "-c", code], cwd=root).returncode
    assert rc == 7
    h2 = locks.hold("TCPIP::127.0.0.1::5025::SOCKET", tmp_path)   # same process: shared
    h.release()
    h2.release()
    rc = subprocess.run([sys.executable, "-c", code], cwd=root).returncode
    assert rc == 0


def test_simulated_instruments_of_different_stands_do_not_contend(tmp_path):
    a = locks.hold("sim:worker-1/supply", tmp_path)
    b = locks.hold("sim:worker-2/supply", tmp_path)
    assert not (tmp_path / "locks").exists()          # nothing written for simulations
    a.release()
    b.release()


def test_budget_of_one_sample():
    b = sample_budget(nplc=1.0, line_hz=50.0)
    items = dict(b.items)
    # one power-line cycle at 50 Hz lasts 1/50 s = 20 ms (definition); + overhead + reply
    amm = [v for k, v in items.items() if k.startswith("ammeter")][0]
    assert amm == pytest.approx(0.020 + 0.005 + 0.02)
    # 8N1 serial: 10 bits per character (common practice, no source); "PR?" + CR LF + 14
    assert items["gauge serial transfer"] == pytest.approx(19 * 10 / 9600)
    assert serial_time_s(960, 9600) == pytest.approx(1.0)
    assert b.total_s == pytest.approx(sum(items.values()))
    check_period(1.0, b)
    with pytest.raises(PeriodTooShort, match="cannot be met"):
        check_period(0.1, b)


def test_budget_grows_with_integration_time():
    slow = sample_budget(nplc=10.0, line_hz=60.0, readings_per_sample=3)
    fast = sample_budget(nplc=0.1, line_hz=60.0)
    assert slow.total_s - fast.total_s == pytest.approx(3 * (10 / 60 + 0.025) - (0.1 / 60 + 0.025))
