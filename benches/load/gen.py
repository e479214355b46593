#!/usr/bin/env python3
"""Request bodies for the load scripts: a 1-axis constant-velocity trolley with an encoder.

  gen.py small            one single-step estimate request (JSON)
  gen.py batch N          one estimate request with N readings (JSON, full output)
  gen.py stream N         NDJSON: the header line, then N reading lines

Readings are a trolley at 0.3 m/s plus deterministic pseudo-noise, so every run sends
the same bytes.
"""
import json
import sys

MODEL = {
    "states": ["pos", "vel"],
    "dynamics": {"rates": {"pos": "vel"}},
    "process_noise": {"density": {"vel": 0.1}},
    "sensors": {"encoder": {"measures": "pos", "std": 0.05}},
}
PRIOR = {"t": 0.0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 1.0, "vel": 5.0}}
FILTER = {"method": "ekf"}
OUTPUT = {"covariance": "full", "innovations": True}


def reading(k):
    t = k * 0.01
    noise = ((k * 2654435761) % 1000) / 1000.0 * 0.1 - 0.05
    return '{"t":%.2f,"values":{"encoder":%.6f}}' % (t, 0.3 * t + noise)


def main():
    mode = sys.argv[1] if len(sys.argv) > 1 else "small"
    n = int(sys.argv[2]) if len(sys.argv) > 2 else 1
    out = sys.stdout
    if mode == "small":
        body = {"model": MODEL, "filter": FILTER, "prior": PRIOR,
                "measurements": [json.loads(reading(1))]}
        out.write(json.dumps(body, separators=(",", ":")))
    elif mode == "batch":
        head = json.dumps({"model": MODEL, "filter": FILTER, "prior": PRIOR, "output": OUTPUT},
                          separators=(",", ":"))
        out.write(head[:-1] + ',"measurements":[')
        step = 10000
        for start in range(1, n + 1, step):
            chunk = ",".join(reading(k) for k in range(start, min(start + step, n + 1)))
            if start > 1:
                out.write(",")
            out.write(chunk)
        out.write("]}")
    elif mode == "stream":
        out.write(json.dumps({"model": MODEL, "filter": FILTER, "prior": PRIOR, "output": OUTPUT},
                             separators=(",", ":")) + "\n")
        step = 10000
        for start in range(1, n + 1, step):
            out.write("\n".join(reading(k) for k in range(start, min(start + step, n + 1))) + "\n")
    else:
        sys.exit("usage: gen.py small | batch N | stream N")


if __name__ == "__main__":
    main()
