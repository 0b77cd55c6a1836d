"""The yardstick for the live daemon: the minimal loop an engineer would write by hand for the
bare job, and nothing more.

pyserial reads whatever has arrived, numpy parses each burst of complete CSV lines, a
vectorised hysteresis per channel finds the edges, and paho-mqtt publishes each edge at QoS 1
on ``<prefix>/<channel>/edge`` with a ``seq`` per channel (so tests/bench/bench_daemon.py can
time it exactly like the daemon). No spool, no stats, no retained state, no reconnection
logic, no bad-line accounting: a malformed burst is simply skipped.

    python tests/bench/hand_loop.py PORT CHANNELS LOW HIGH MQTT_PORT PREFIX

It stops cleanly on SIGTERM/SIGINT. Not part of the test suite; bench_daemon.py runs it.
"""

from __future__ import annotations

import json
import signal
import sys

import numpy as np
import paho.mqtt.client as paho
import serial


def hysteresis(x: np.ndarray, low: float, high: float, level: int) -> tuple[np.ndarray, np.ndarray, int]:
    """Edges of a Schmitt trigger over ``x`` starting at ``level`` (-1: unknown):
    (indices of the samples that changed the level, the new levels, the final level)."""
    dec = np.where(x > high, 1, np.where(x < low, 0, -1))
    idx = np.flatnonzero(dec >= 0)
    if idx.size == 0:
        return idx, idx, level
    lv = dec[idx]
    prev = np.concatenate(([level], lv[:-1]))
    ch = np.flatnonzero((lv != prev) & (prev >= 0))
    return idx[ch], lv[ch], int(lv[-1])


def main() -> int:
    port, nch, low, high, mqtt_port, prefix = sys.argv[1:7]
    nch, low, high = int(nch), float(low), float(high)
    stop = False

    def on_signal(*_: object) -> None:
        nonlocal stop
        stop = True

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    client = paho.Client(paho.CallbackAPIVersion.VERSION2, client_id="hand-loop")
    client.connect("127.0.0.1", int(mqtt_port))
    client.loop_start()
    ser = serial.Serial(port, 115200, timeout=0.1)
    print("opened", port, flush=True)
    levels = [-1] * nch
    seqs = [0] * nch
    buf = b""
    while not stop:
        try:
            data = ser.read(ser.in_waiting or 1)
        except (OSError, serial.SerialException):
            break
        if not data:
            continue
        buf += data
        cut = buf.rfind(b"\n")
        if cut < 0:
            continue
        block, buf = buf[:cut], buf[cut + 1:]
        try:
            rows = np.array(block.replace(b"\n", b",").split(b","), dtype=np.float64).reshape(-1, nch + 1)
        except ValueError:
            continue  # a malformed burst: skipped
        for c in range(nch):
            idx, lv, levels[c] = hysteresis(rows[:, c + 1], low, high, levels[c])
            for i, level in zip(idx.tolist(), lv.tolist()):
                seqs[c] += 1
                payload = json.dumps({"t": rows[i, 0], "level": level, "seq": seqs[c]})
                client.publish(f"{prefix}/c{c}/edge", payload, qos=1)
    client.loop_stop()
    client.disconnect()
    return 0


if __name__ == "__main__":
    sys.exit(main())
