#!/usr/bin/env python3
"""Peak and after-burst memory of `tamis serve` under many large messages at once.

    cargo build --release
    .venv/bin/python benches/burst_memory.py [CONNECTIONS] [MESSAGE_MB]

Starts the release daemon on loopback with built-in defaults, opens CONNECTIONS relay
connections (default 250) that each stream one MESSAGE_MB-megabyte message (default 8.4) at
the same time, waits for every verdict, and prints the daemon's peak resident memory
(VmHWM) and its resident memory (VmRSS) a few seconds after the burst, both read from
/proc/<pid>/status, next to the resident memory before the burst as the baseline. A run by
hand, not a test: the figures depend on the machine.
"""
import os
import socket
import subprocess
import sys
import tempfile
import threading
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, os.path.join(ROOT, "clients", "python"))
import tamis_client as tc  # noqa: E402


def status_kib(pid: int, key: str) -> int:
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith(key + ":"):
                return int(line.split()[1])
    raise KeyError(key)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def main() -> None:
    connections = int(sys.argv[1]) if len(sys.argv) > 1 else 250
    size = int(float(sys.argv[2] if len(sys.argv) > 2 else "8.4") * 1e6)
    port, metrics = free_port(), free_port()
    with tempfile.TemporaryDirectory() as tmp:
        config = os.path.join(tmp, "tamis.toml")
        with open(config, "w") as f:
            f.write(f'metrics = "127.0.0.1:{metrics}"\n[listen]\ntcp = "127.0.0.1:{port}"\n'
                    f'[limits]\nmax_connections = {connections + 16}\n'
                    f'[store]\npath = "{tmp}/store.sqlite"\n')
        daemon = subprocess.Popen([os.path.join(ROOT, "target", "release", "tamis"), "serve",
                                   "--config", config], stderr=subprocess.DEVNULL)
        try:
            addr = f"127.0.0.1:{port}"
            for _ in range(100):
                try:
                    socket.create_connection(("127.0.0.1", port), timeout=1).close()
                    break
                except OSError:
                    time.sleep(0.1)
            before = status_kib(daemon.pid, "VmRSS")
            line = b"Lorem ipsum dolor sit amet, the quarterly figures are attached.\r\n"
            body = (line * (size // len(line) + 1))[:size]
            verdicts, errors = [], []
            start = threading.Barrier(connections)

            def one(i: int) -> None:
                try:
                    with tc.Client(addr, timeout=300) as c:
                        c.hello()
                        start.wait()
                        v = c.scan("sender@example.net", [f"user{i}@example.org"],
                                   b"Subject: burst\r\nFrom: sender@example.net\r\n\r\n" + body)
                        verdicts.append(v)
                except Exception as e:  # noqa: BLE001 - reported below
                    errors.append(repr(e))

            threads = [threading.Thread(target=one, args=(i,)) for i in range(connections)]
            t0 = time.time()
            for t in threads:
                t.start()
            for t in threads:
                t.join()
            took = time.time() - t0
            peak = status_kib(daemon.pid, "VmHWM")
            time.sleep(3)
            after = status_kib(daemon.pid, "VmRSS")
            print(f"{connections} connections x {size / 1e6:.1f} MB: {len(verdicts)} verdicts, "
                  f"{len(errors)} errors in {took:.1f} s")
            for e in errors[:3]:
                print("  error:", e)
            print(f"resident before {before / 1024:.0f} MiB, peak {peak / 1024:.0f} MiB "
                  f"({peak / before:.1f}x), after {after / 1024:.0f} MiB ({after / before:.1f}x)")
        finally:
            daemon.terminate()
            daemon.wait(timeout=30)


if __name__ == "__main__":
    main()
