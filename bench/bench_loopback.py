"""Set-voltage-then-read cycles through sim-serve (its loopback server, the simulated
supply, an emitting fibre behind it, wall clock) against a bare socket echo server in
the same run, in interleaved rounds. Both servers run in this process, both clients use TCP_NODELAY and the
same two writes per cycle (``SOUR:VOLT <v>`` then ``MEAS:VOLT?``, one reply line).

Goal (issue 4): at least 0.3 of the bare echo rate.

    python bench/bench_loopback.py [--cycles N] [--emitters N]
"""
from __future__ import annotations

import argparse
import os
import socket
import sys
import threading
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from sequencer.commands import sim_serve  # noqa: E402


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


class Client:
    """One connection; ``run(n)`` does n set-then-read cycles and keeps their times."""

    def __init__(self, port: int):
        self.c = socket.create_connection(("127.0.0.1", port), timeout=5.0)
        self.c.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.buf = b""
        self.times = []
        self.total = 0.0
        self.k = 0

    def run(self, n: int) -> None:
        c = self.c
        t_start = time.perf_counter()
        for _ in range(n):
            t0 = time.perf_counter()
            c.sendall(f"SOUR:VOLT {500.0 + 0.1 * (self.k % 2):.1f}\n".encode())
            c.sendall(b"MEAS:VOLT?\n")
            while b"\n" not in self.buf:
                chunk = c.recv(4096)
                if not chunk:
                    raise ConnectionError("server closed")
                self.buf += chunk
            _, self.buf = self.buf.split(b"\n", 1)
            self.times.append(time.perf_counter() - t0)
            self.k += 1
        self.total += time.perf_counter() - t_start

    def figures(self):
        t = sorted(self.times)
        return len(t) / self.total, t[int(0.99 * (len(t) - 1))], t[-1]

    def close(self):
        self.c.close()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cycles", type=int, default=4000)
    ap.add_argument("--rounds", type=int, default=20)
    ap.add_argument("--emitters", type=int, default=10000)
    ap.add_argument("--physics-step", type=float, default=0.05,
                    help="shortest cathode step, s (the stand default)")
    a = ap.parse_args(argv)

    serving = sim_serve.start({"simulation": {"seed": 7, "cathode": {"emitters": a.emitters},
                                              "physics_step_s": a.physics_step}})
    stand = serving.stand
    stand.supply.handle("SOUR:CURR 1e-4;SOUR:VOLT 500;OUTP ON")
    srv = serving.servers["supply"]
    echo = EchoServer().start()
    echo_client, sim_client = Client(echo.port), Client(srv.port)
    try:
        # The supply slews to 500 V after OUTP ON; while it moves, every command re-solves
        # the cathode (the stand steps whenever the output moved). Measure the steady
        # set-then-read cycle of a dwell: wait (bounded) until the output has arrived.
        deadline = time.monotonic() + 30.0
        while time.monotonic() < deadline:
            if abs(float(stand.supply.handle("MEAS:VOLT?")) - 500.0) < 0.5:
                break
            time.sleep(0.05)
        echo_client.run(100)              # warm-up, not counted
        sim_client.run(100)
        echo_client.times, echo_client.total = [], 0.0
        sim_client.times, sim_client.total = [], 0.0
        per_round = max(1, a.cycles // a.rounds)
        for _ in range(a.rounds):         # interleaved, so a change of machine load
            echo_client.run(per_round)    # hits both sides alike
            sim_client.run(per_round)
        e_rate, e_p99, e_max = echo_client.figures()
        s_rate, s_p99, s_max = sim_client.figures()
    finally:
        echo_client.close()
        sim_client.close()
        serving.stop()
        echo.stop()
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"cycles: {a.cycles} each side in {a.rounds} interleaved rounds; load average "
          f"{load:.2f}; physics step {a.physics_step:g} s")
    print(f"simulated cathode: {a.emitters} emitters, output on at "
          f"{stand.truth.voltage_v:.0f} V, emitting {stand.truth.current_a:.3g} A")
    print(f"bare echo : {e_rate:9.1f} cycles/s   p99 {e_p99 * 1e3:7.3f} ms   worst {e_max * 1e3:7.3f} ms")
    print(f"sim-serve : {s_rate:9.1f} cycles/s   p99 {s_p99 * 1e3:7.3f} ms   worst {s_max * 1e3:7.3f} ms")
    print(f"loopback: ratio {s_rate / e_rate:.2f} (sim-serve cycles/s / bare echo cycles/s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
