#!/usr/bin/env python3
"""Check that every plotweave metric that alerts.yml and alerts_test.yml use is a metric the
real binary exposes.

Starts `PLOTWEAVE_BIN demo --listen 127.0.0.1:0` (the embedded demo site, fed by its
simulator), sends one batch it must refuse over a real WebSocket (so the per-reason rejection
counter, created on first use, exists too), scrapes GET /metrics and compares. Histogram
series (_bucket, _sum, _count) count as their histogram. Exit status 0 when every name is
exposed, 1 otherwise; the demo process is always stopped.

Usage: PLOTWEAVE_BIN=target/debug/plotweave python3 deploy/prometheus/check_metric_names.py
"""

import base64
import os
import pathlib
import re
import socket
import subprocess
import sys
import time

HERE = pathlib.Path(__file__).resolve().parent


def ws_send_text(host, port, path, text):
    """One text message over a minimal RFC 6455 client; returns the first reply's text."""
    s = socket.create_connection((host, port), timeout=10)
    key = base64.b64encode(os.urandom(16)).decode()
    s.sendall(
        (
            f"GET {path} HTTP/1.1\r\nHost: {host}:{port}\r\nUpgrade: websocket\r\n"
            f"Connection: Upgrade\r\nSec-WebSocket-Key: {key}\r\nSec-WebSocket-Version: 13\r\n\r\n"
        ).encode()
    )
    head = b""
    while b"\r\n\r\n" not in head:
        chunk = s.recv(4096)
        if not chunk:
            raise RuntimeError("connection closed during the WebSocket handshake")
        head += chunk
    status = head.split(b"\r\n", 1)[0]
    if b" 101 " not in status:
        raise RuntimeError(f"upgrade refused: {status.decode(errors='replace')}")
    rest = head.split(b"\r\n\r\n", 1)[1]
    payload = text.encode()
    mask = os.urandom(4)
    assert len(payload) < 126
    frame = bytes([0x81, 0x80 | len(payload)]) + mask
    frame += bytes(b ^ mask[i % 4] for i, b in enumerate(payload))
    s.sendall(frame)
    data = rest
    while len(data) < 2 or len(data) < 2 + (data[1] & 0x7F):
        data += s.recv(4096)
    n = data[1] & 0x7F
    if n == 126:
        while len(data) < 4:
            data += s.recv(4096)
        n = int.from_bytes(data[2:4], "big")
        start = 4
    else:
        start = 2
    while len(data) < start + n:
        data += s.recv(4096)
    s.close()
    return data[start : start + n].decode()


def exposed_names(text):
    names = set()
    for line in text.splitlines():
        if line.startswith("# TYPE "):
            names.add(line.split()[2])
        elif line and not line.startswith("#"):
            names.add(re.split(r"[{ ]", line, maxsplit=1)[0])
    for n in list(names):
        for suffix in ("_bucket", "_sum", "_count"):
            if n.endswith(suffix):
                names.add(n[: -len(suffix)])
    return names


def used_names():
    used = set()
    for f in ("alerts.yml", "alerts_test.yml"):
        used |= set(re.findall(r"\bplotweave_[a-z0-9_]+", (HERE / f).read_text()))
    return used


def main():
    binary = os.environ.get("PLOTWEAVE_BIN")
    if not binary:
        print("FAIL PLOTWEAVE_BIN is not set")
        return 1
    proc = subprocess.Popen(
        [binary, "demo", "--listen", "127.0.0.1:0"],
        stdout=subprocess.PIPE,
        stderr=subprocess.DEVNULL,
        text=True,
    )
    try:
        first = proc.stdout.readline().strip()
        m = re.fullmatch(r"listening on http://([0-9.]+):(\d+)", first)
        if not m:
            print(f"FAIL unexpected first line from the demo: {first!r}")
            return 1
        host, port = m.group(1), int(m.group(2))
        reply = ws_send_text(
            host,
            port,
            "/v1/ingest",
            '{"sensor":"kestrel-radar","seq":1,"time":-1,"detections":[]}',
        )
        if '"out_of_range"' not in reply:
            print(f"FAIL the refused batch was answered {reply!r}")
            return 1
        # Let the simulator deliver a few scans (radar period 2.5 s) so histograms have data.
        time.sleep(3)
        s = socket.create_connection((host, port), timeout=10)
        s.sendall(f"GET /metrics HTTP/1.1\r\nHost: {host}\r\nConnection: close\r\n\r\n".encode())
        raw = b""
        while chunk := s.recv(65536):
            raw += chunk
        s.close()
        body = raw.split(b"\r\n\r\n", 1)[1].decode()
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
    exposed = exposed_names(body)
    missing = sorted(used_names() - exposed)
    for name in missing:
        print(f"FAIL {name} is used by the alert rules but not exposed by {binary}")
    if not missing:
        print(f"ok   all {len(used_names())} plotweave metric names of the rules are exposed")
    return 1 if missing else 0


if __name__ == "__main__":
    sys.exit(main())
