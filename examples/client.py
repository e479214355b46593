#!/usr/bin/env python3
"""A tacit client in a page of standard-library Python: recover an overhead crane
trolley's velocity from its position encoder alone.

The trolley (an invented scenario) accelerates at 0.25 m/s^2 for two seconds and then
coasts at 0.5 m/s; its encoder reports position every 0.1 s with a few millimetres of
noise, and now and then drops a reading. The script posts the first two seconds of
readings to POST /v1/estimate, prints the recovered velocity per line, then sends the
next two seconds as a second request whose prior is the first answer's posterior, exactly
as a client streaming over many requests (to any instance) would.

Usage: python3 examples/client.py [BASE_URL]   (default http://127.0.0.1:8080)
Set TACIT_API_KEY when the server requires keys. Exits non-zero on any failure,
including a final velocity that misses the true 0.5 m/s by more than four standard
deviations.
"""

import json
import os
import sys
import urllib.error
import urllib.request

MODEL = {
    "states": ["pos", "vel"],
    # Nearly constant velocity: the unknown acceleration enters as process noise on vel.
    "dynamics": {"rates": {"pos": "vel"}},
    "process_noise": {"density": {"vel": 0.01}},
    "sensors": {"encoder": {"measures": "pos", "std": 0.002}},
}
FILTER = {"method": "ekf"}
PRIOR = {"t": 0.0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 0.01, "vel": 1.0}}
TRUE_FINAL_VELOCITY = 0.5


def trolley_position(t):
    """Where the invented trolley is at time t (seconds): 0.25 m/s^2 for 2 s, then coasting."""
    return 0.125 * t * t if t < 2.0 else 0.5 + 0.5 * (t - 2.0)


def readings(first, last):
    """Encoder lines for steps first..last (0.1 s apart), with repeatable noise and every
    seventh reading dropped (the line stays: its estimate is a prediction)."""
    lines = []
    for k in range(first, last + 1):
        t = round(0.1 * k, 6)
        noise = 0.003 * ((k * 7919) % 13 - 6) / 6.0  # deterministic, within +-3 mm
        line = {"t": t}
        if k % 7 != 0:
            line["values"] = {"encoder": round(trolley_position(t) + noise, 6)}
        lines.append(line)
    return lines


def estimate(base, prior, measurements):
    """POST one estimate request; return the parsed answer or raise SystemExit."""
    body = json.dumps(
        {"model": MODEL, "filter": FILTER, "prior": prior, "measurements": measurements}
    ).encode()
    headers = {"content-type": "application/json"}
    key = os.environ.get("TACIT_API_KEY")
    if key:
        headers["authorization"] = f"Bearer {key}"
    req = urllib.request.Request(base + "/v1/estimate", data=body, headers=headers, method="POST")
    try:
        with urllib.request.urlopen(req, timeout=30) as res:
            return json.loads(res.read())
    except urllib.error.HTTPError as e:
        # Errors are problem+json: show the server's own explanation.
        try:
            problem = json.loads(e.read())
            detail = f"{problem.get('title')}: {problem.get('detail')} {problem.get('errors', '')}"
        except ValueError:
            detail = e.reason
        raise SystemExit(f"error: {base} answered {e.code}: {detail}")
    except (urllib.error.URLError, OSError) as e:
        raise SystemExit(f"error: cannot reach {base}: {e}")


def show(answer):
    for est in answer["estimates"]:
        mean, std = est["mean"], est["std"]
        print(
            f"t={est['t']:4.1f} s  pos={mean['pos']:7.4f} m  "
            f"vel={mean['vel']:7.4f} +- {std['vel']:.4f} m/s"
        )


def main():
    base = (sys.argv[1] if len(sys.argv) > 1 else "http://127.0.0.1:8080").rstrip("/")
    print("first request: 0.1 s .. 2.0 s")
    first = estimate(base, PRIOR, readings(1, 20))
    show(first)
    print("second request, continuing from the first answer's posterior: 2.1 s .. 4.0 s")
    second = estimate(base, first["posterior"], readings(21, 40))
    show(second)

    if len(first["estimates"]) != 20 or len(second["estimates"]) != 20:
        raise SystemExit("error: expected one estimate per reading line")
    # The last estimate is at the posterior's time; it carries the standard deviations.
    final = second["estimates"][-1]
    vel, std = final["mean"]["vel"], final["std"]["vel"]
    summary = second["summary"]
    print(
        f"final velocity {vel:.4f} +- {std:.4f} m/s (true {TRUE_FINAL_VELOCITY}); "
        f"NIS verdict: {summary['nis']['verdict']}"
    )
    if not abs(vel - TRUE_FINAL_VELOCITY) <= 4.0 * std:
        raise SystemExit("error: the recovered velocity is not consistent with the true one")


if __name__ == "__main__":
    main()
