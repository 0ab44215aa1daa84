#!/usr/bin/env python3
"""Collect a device's breaths from breathd's MQTT topics into a pandas DataFrame.

The column order, types and units come from the device's retained meta topic
(breathd's data dictionary), so nothing here repeats a field name or a unit.

    python3 configs/examples/breaths_to_pandas.py --device demo --count 20

Needs paho-mqtt and pandas (Debian: python3-paho-mqtt, python3-pandas).
breathd is advisory research software, not a medical device.
"""
import argparse
import json
import queue
import sys

import pandas as pd
import paho.mqtt.client as mqtt


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--host", default="127.0.0.1")
    ap.add_argument("--port", type=int, default=1883)
    ap.add_argument("--root", default="breathd")
    ap.add_argument("--device", required=True)
    ap.add_argument("--count", type=int, default=20, help="breaths to collect")
    ap.add_argument("--timeout", type=float, default=120, help="seconds to wait for them")
    ap.add_argument("--csv", help="also write the DataFrame to this CSV file")
    args = ap.parse_args()

    base = f"{args.root}/{args.device}/"
    inbox = queue.Queue()
    try:  # paho-mqtt 2 asks which callback API; 1.x has no such argument
        client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION1)
    except AttributeError:
        client = mqtt.Client()
    client.on_connect = lambda c, u, f, rc: c.subscribe([(base + "meta", 1), (base + "breath", 0)])
    client.on_message = lambda c, u, m: inbox.put((m.topic, m.payload))
    client.connect(args.host, args.port)
    client.loop_start()

    meta, breaths = None, []
    try:
        while meta is None or len(breaths) < args.count:
            topic, payload = inbox.get(timeout=args.timeout)
            if topic == base + "meta":
                meta = json.loads(payload)
            elif topic == base + "breath":
                breaths.append(json.loads(payload))
    except queue.Empty:
        sys.exit(f"waited {args.timeout:.0f} s: meta {'received' if meta else 'missing'}, {len(breaths)} breaths")
    finally:
        client.loop_stop()
        client.disconnect()

    entries = meta["dictionary"]["breath"]
    df = pd.DataFrame(breaths, columns=[e["name"] for e in entries])
    for e in entries:  # types from the dictionary: no column of numbers left as objects
        name = e["name"]
        if e["type"] in ("number", "integer"):
            df[name] = pd.to_numeric(df[name], errors="coerce")
        elif e["type"] == "datetime":
            df[name] = pd.to_datetime(df[name], utc=True, errors="coerce")
        elif e["type"] == "array":
            df[name] = df[name].map(lambda v: " ".join(v or []))
    df.attrs["units"] = {e["name"]: e.get("unit", "") for e in entries}
    df.attrs["breathd"] = {"version": meta["version"], "run": meta["run"]}

    units = df.attrs["units"]
    numeric = [e["name"] for e in entries if e["type"] == "number"]
    left_as_objects = [c for c in numeric if df[c].dtype == object]
    print(f"{len(df)} breaths of {args.device} (breathd {meta['version']}, run {meta['run']}), "
          f"{len(df.columns)} columns, {len(left_as_objects)} numeric columns left as objects")
    for name in ("vti", "dp", "cstat", "fit_r"):
        print(f"  median {name}: {df[name].median():.1f} {units[name]}")
    if args.csv:
        df.to_csv(args.csv, index=False)
    return 1 if left_as_objects else 0


if __name__ == "__main__":
    sys.exit(main())
