"""Set-voltage-then-read cycles through sim-serve's loopback server to the simulated
supply (emitting fibre behind it, wall clock), against a bare socket echo server in
the same run. Both servers run in this process, both clients use TCP_NODELAY and the
same two writes per cycle (``SOUR:VOLT <v>`` then ``MEAS:VOLT?``, one reply line).

Goal (issue 4): at least 0.3 of the bare echo rate.

    python bench/bench_loopback.py [--cycles N] [--emitters N]
"""
from __future__ import annotations

import argparse
import socket
import sys
import threading
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from drivers.clock import WallClock  # noqa: E402
from simulators.loopback import LoopbackServer  # noqa: E402
from simulators.stand import SimulatedStand  # noqa: E402


class EchoServer:
    """The reference: reads lines, answers each query line with itself, nothing else."""

    def __init__(self):
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self.sock.bind(("127.0.0.1", 0))
        self.sock.listen(1)
        self.port = self.sock.getsockname()[1]
        self.thread = threading.Thread(target=self._serve, daemon=True)

    def start(self):
        self.thread.start()
        return self

    def _serve(self):
        conn, _ = self.sock.accept()
        conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        buf = b""
        with conn:
            while True:
                chunk = conn.recv(65536)
                if not chunk:
                    return
                buf += chunk
                while b"\n" in buf:
                    line, buf = buf.split(b"\n", 1)
                    if line.endswith(b"?"):
                        conn.sendall(line + b"\n")

    def stop(self):
        self.sock.close()


def cycles(port: int, n: int):
    c = socket.create_connection(("127.0.0.1", port), timeout=5.0)
    c.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    times = []
    buf = b""
    with c:
        t_start = time.perf_counter()
        for k in range(n):
            t0 = time.perf_counter()
            c.sendall(f"SOUR:VOLT {500.0 + 0.1 * (k % 2):.1f}\n".encode())
            c.sendall(b"MEAS:VOLT?\n")
            while b"\n" not in buf:
                chunk = c.recv(4096)
                if not chunk:
                    raise ConnectionError("server closed")
                buf += chunk
            _, buf = buf.split(b"\n", 1)
            times.append(time.perf_counter() - t0)
        total = time.perf_counter() - t_start
    times.sort()
    return n / total, times[int(0.99 * (n - 1))], times[-1]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cycles", type=int, default=3000)
    ap.add_argument("--emitters", type=int, default=10000)
    ap.add_argument("--physics-step", type=float, default=0.01,
                    help="shortest cathode step, s (the stand default)")
    a = ap.parse_args(argv)

    stand = SimulatedStand({"seed": 7, "cathode": {"emitters": a.emitters},
                            "physics_step_s": a.physics_step}, WallClock())
    stand.supply.handle("SOUR:CURR 1e-4;SOUR:VOLT 500;OUTP ON")
    srv = LoopbackServer(stand.supply).start()
    echo = EchoServer().start()
    try:
        cycles(echo.port, 200)  # warm-up of the reference only; it accepts one client
        echo.stop()
        echo = EchoServer().start()
        e_rate, e_p99, e_max = cycles(echo.port, a.cycles)
        s_rate, s_p99, s_max = cycles(srv.port, a.cycles)
    finally:
        srv.stop()
        echo.stop()
    print(f"cycles per run: {a.cycles}; simulated cathode: {a.emitters} emitters, output on at "
          f"{stand.truth.voltage_v:.0f} V, emitting {stand.truth.current_a:.3g} A")
    print(f"bare echo : {e_rate:9.1f} cycles/s   p99 {e_p99 * 1e3:7.3f} ms   worst {e_max * 1e3:7.3f} ms")
    print(f"sim-serve : {s_rate:9.1f} cycles/s   p99 {s_p99 * 1e3:7.3f} ms   worst {s_max * 1e3:7.3f} ms")
    print(f"loopback: ratio {s_rate / e_rate:.2f} (sim-serve cycles/s / bare echo cycles/s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
