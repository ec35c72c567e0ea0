"""Throughput of the sequencer's inner loop over a raw VISA socket: set a voltage, then read
a current, against the loopback SCPI server on 127.0.0.1, through pyvisa-py (fieldrun's
VisaTransport) and through a bare socket client doing the same cycles, in the same run.

Prints cycles/s, p99 and worst cycle time for each, then the ratio line.
Usage: python -m bench.bench_transport [--cycles N]
"""
from __future__ import annotations

import argparse
import os
import socket
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from drivers.transport_visa import VisaTransport  # noqa: E402
from simulators.loopback import LoopbackServer  # noqa: E402


class BenchSupplyAmmeter:
    """Answers MEAS:CURR? at once; accepts SOUR:VOLT. Nothing else matters here."""

    def __init__(self):
        self.v = 0.0

    def handle(self, line):
        if line.startswith("SOUR:VOLT "):
            self.v = float(line[10:])
            return None
        if line == "MEAS:CURR?":
            return "1.234E-09"
        if line == "*OPC?":
            return "1"
        if line == "*IDN?":
            return "KESTREL LANE,BENCH,0,0"
        return None


def stats(times):
    s = sorted(times)
    total = sum(s)
    p99 = s[min(len(s) - 1, int(0.99 * len(s)))]
    return len(s) / total, p99, s[-1]


def run_visa(resource, n, nodelay=True, single_send=False):
    t = VisaTransport(resource, timeout=2.0, nodelay=nodelay)
    times = []
    try:
        for i in range(n):
            cmd = f"SOUR:VOLT {100 + i % 50}"
            t0 = time.perf_counter()
            if single_send:
                t.exchange([cmd], "MEAS:CURR?")
            else:
                t.write(cmd)
                t.query("MEAS:CURR?")
            times.append(time.perf_counter() - t0)
    finally:
        t.close()
    return stats(times)


def run_bare(port, n):
    s = socket.create_connection(("127.0.0.1", port))
    s.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    times = []
    buf = b""
    try:
        for i in range(n):
            t0 = time.perf_counter()
            s.sendall(f"SOUR:VOLT {100 + i % 50}\n".encode())
            s.sendall(b"MEAS:CURR?\n")
            while b"\n" not in buf:
                buf += s.recv(4096)
            _, buf = buf.split(b"\n", 1)
            times.append(time.perf_counter() - t0)
    finally:
        s.close()
    return stats(times)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cycles", type=int, default=2000)
    args = ap.parse_args(argv)
    n = max(50, args.cycles)
    srv = LoopbackServer(BenchSupplyAmmeter(), max_clients=1).start()
    try:
        run_bare(srv.port, 50)                       # warm up both paths
        run_visa(srv.resource, 50)
        bare = run_bare(srv.port, n)
        visa = run_visa(srv.resource, n)
        single = run_visa(srv.resource, n, single_send=True)
        naive = run_visa(srv.resource, max(50, n // 10), nodelay=False)
    finally:
        srv.stop()
    rows = [("bare socket (TCP_NODELAY, two sends)", bare),
            ("pyvisa-py VisaTransport write + query", visa),
            ("pyvisa-py VisaTransport one send (exchange)", single),
            ("pyvisa-py without TCP_NODELAY (for reference)", naive)]
    print(f"set-voltage-then-read-current cycles over 127.0.0.1, {n} cycles each")
    for label, (rate, p99, worst) in rows:
        print(f"  {label:48s} {rate:9.0f} cycles/s  p99 {p99 * 1e3:7.3f} ms  "
              f"worst {worst * 1e3:7.3f} ms")
    print(f"transport: ratio {visa[0] / bare[0]:.2f} (pyvisa-py cycles/s / bare socket cycles/s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
