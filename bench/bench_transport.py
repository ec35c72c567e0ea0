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


def visa_cycles(t, n, single_send, times):
    for i in range(n):
        cmd = f"SOUR:VOLT {100 + i % 50}"
        t0 = time.perf_counter()
        if single_send:
            t.exchange([cmd], "MEAS:CURR?")
        else:
            t.write(cmd)
            t.query("MEAS:CURR?")
        times.append(time.perf_counter() - t0)


class Bare:
    """The reference: a plain socket client with TCP_NODELAY, the same two sends."""

    def __init__(self, port):
        self.s = socket.create_connection(("127.0.0.1", port))
        self.s.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.buf = b""

    def cycles(self, n, times):
        s = self.s
        for i in range(n):
            t0 = time.perf_counter()
            s.sendall(f"SOUR:VOLT {100 + i % 50}\n".encode())
            s.sendall(b"MEAS:CURR?\n")
            while b"\n" not in self.buf:
                self.buf += s.recv(4096)
            _, self.buf = self.buf.split(b"\n", 1)
            times.append(time.perf_counter() - t0)

    def close(self):
        self.s.close()


def measure(resource, port, n, rounds=10):
    """Interleave short rounds of each client so load from other processes hits both
    alike; each client keeps its own connection (the server takes several clients)."""
    per = max(10, n // rounds)
    bare, visa, single = [], [], []
    b = Bare(port)
    t1 = VisaTransport(resource, timeout=2.0)
    t2 = VisaTransport(resource, timeout=2.0)
    try:
        b.cycles(50, [])
        visa_cycles(t1, 50, False, [])
        visa_cycles(t2, 50, True, [])
        for _ in range(rounds):
            b.cycles(per, bare)
            visa_cycles(t1, per, False, visa)
            visa_cycles(t2, per, True, single)
    finally:
        b.close()
        t1.close()
        t2.close()
    naive_t = VisaTransport(resource, timeout=2.0, nodelay=False)
    naive = []
    try:
        visa_cycles(naive_t, 40, False, naive)
    finally:
        naive_t.close()
    return stats(bare), stats(visa), stats(single), stats(naive)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cycles", type=int, default=2000)
    args = ap.parse_args(argv)
    n = max(50, args.cycles)
    srv = LoopbackServer(BenchSupplyAmmeter(), max_clients=4).start()
    try:
        bare, visa, single, naive = measure(srv.resource, srv.port, n)
    finally:
        srv.stop()
    rows = [("bare socket (TCP_NODELAY, two sends)", bare),
            ("pyvisa-py VisaTransport write + query", visa),
            ("pyvisa-py VisaTransport one send (exchange)", single),
            ("pyvisa-py without TCP_NODELAY (for reference)", naive)]
    print(f"set-voltage-then-read-current cycles over 127.0.0.1, {n} cycles each in 10 "
          f"interleaved rounds (40 without TCP_NODELAY); load average "
          f"{os.getloadavg()[0]:.2f} on {os.cpu_count()} CPUs")
    for label, (rate, p99, worst) in rows:
        print(f"  {label:48s} {rate:9.0f} cycles/s  p99 {p99 * 1e3:7.3f} ms  "
              f"worst {worst * 1e3:7.3f} ms")
    print(f"transport: ratio {visa[0] / bare[0]:.2f} (pyvisa-py cycles/s / bare socket cycles/s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
