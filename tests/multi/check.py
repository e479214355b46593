#!/usr/bin/env python3
"""Proof that any tacit instance can continue any stream (driven by tests/multi/run.sh).

Two `tacit serve` processes sit behind nginx (round robin, one worker, `X-Upstream:
$upstream_addr` on every answer). For ekf, ukf and enkf, one reading sequence of an
invented crane trolley is sent in chunks through nginx, each chunk's posterior becoming
the next chunk's prior, and the concatenated estimates must be bit-identical to one
request sent straight to one instance. The X-Upstream header proves that consecutive
chunks were served by different processes. Then the three streams run again, interleaved,
and the instance due to serve the next chunk is killed mid-run: nginx must retry that
chunk on the survivor, and every stream must still end bit-identical.

Standard library only. Every wait is bounded; any failure exits non-zero with a reason.
"""

import argparse
import json
import os
import signal
import socket
import sys
import time
import urllib.error
import urllib.request

# A crane trolley on a 1-axis runway: an encoder reads position only; the motor force is
# a known input, the rail drag coefficient is estimated. Invented for this test.
MODEL = {
    "states": ["pos", "vel"],
    "inputs": ["force"],
    "parameters": {"mass": 40.0, "drag": {"initial": 2.0, "std": 1.0, "random_walk": 1e-3}},
    "dynamics": {"rates": {"pos": "vel", "vel": "(force - drag*vel)/mass"}},
    "process_noise": {"density": {"vel": 0.02}},
    "sensors": {"encoder": {"measures": "pos", "std": 0.003}},
}
PRIOR = {"t": 0.0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 0.05, "vel": 0.5}}
FILTERS = {
    "ekf": {"method": "ekf"},
    "ukf": {"method": "ukf"},
    "enkf": {"method": "enkf", "ensemble": {"members": 24, "seed": 2024}},
}
LINES = 72
CHUNK = 8  # 9 chunks per stream


def readings():
    """Deterministic readings: a pseudo-random walk of noise from a fixed LCG (not
    random, so a failure reproduces), a force profile that changes mid-chunk and must be
    held across chunk boundaries, and dropped readings (lines with no values)."""
    state = 0x7AC17
    out = []
    for k in range(1, LINES + 1):
        state = (state * 6364136223846793005 + 1442695040888963407) % (1 << 64)
        noise = ((state >> 33) / float(1 << 31) - 0.5) * 0.006
        t = round(k * 0.05, 10)
        # The trolley's position, roughly: accelerating, then coasting.
        pos = 0.5 * 0.25 * t * t if t < 2.0 else 0.5 + 0.5 * (t - 2.0)
        line = {"t": t}
        if k % 5 != 0:
            line["values"] = {"encoder": pos + noise}
        if k == 1:
            line["inputs"] = {"force": 12.0}
        elif k == 43:
            line["inputs"] = {"force": 1.0}
        out.append(line)
    return out


class Failure(Exception):
    """A check failed; the message says which and why."""


def post(url, body, timeout=30.0):
    """POST JSON; return (parsed body, headers). Any non-200 is a Failure."""
    data = json.dumps(body).encode()
    req = urllib.request.Request(
        url, data=data, method="POST", headers={"content-type": "application/json"}
    )
    try:
        with urllib.request.urlopen(req, timeout=timeout) as res:
            return json.loads(res.read()), res.headers
    except urllib.error.HTTPError as e:
        raise Failure(f"POST {url}: {e.code} {e.read()[:500]!r}") from None
    except (urllib.error.URLError, OSError) as e:
        raise Failure(f"POST {url}: {e}") from None


def wait_healthy(base, seconds=20.0):
    """Poll GET base/healthz until it answers 200, for at most `seconds`."""
    deadline = time.monotonic() + seconds
    last = None
    while time.monotonic() < deadline:
        try:
            with urllib.request.urlopen(base + "/healthz", timeout=2.0) as res:
                if res.status == 200:
                    return
        except (urllib.error.URLError, OSError) as e:
            last = e
        time.sleep(0.1)
    raise Failure(f"{base} not healthy within {seconds} s: {last}")


def wait_refused(addr, seconds=10.0):
    """Poll until nothing accepts connections on addr ("host:port")."""
    host, port = addr.rsplit(":", 1)
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        try:
            socket.create_connection((host, int(port)), timeout=0.5).close()
        except OSError:
            return
        time.sleep(0.05)
    raise Failure(f"{addr} still accepts connections after its process was killed")


def canon(value):
    """Exact text of a JSON value: Python floats print their shortest round-trip form,
    so equal text means equal bits (and -0.0 stays distinct from 0.0)."""
    return json.dumps(value, sort_keys=False, allow_nan=False)


def request(method, prior, lines):
    return {"model": MODEL, "filter": FILTERS[method], "prior": prior, "measurements": lines}


def upstreams(headers):
    """The instances nginx tried for one request, in order ("a, b" after a retry)."""
    raw = headers.get("X-Upstream")
    if not raw:
        raise Failure("answer through nginx has no X-Upstream header")
    return [a.strip() for a in raw.split(",")]


def assert_same(method, single, estimates, posterior, what):
    want = single["estimates"]
    if len(estimates) != len(want):
        raise Failure(f"{method} {what}: {len(estimates)} estimates, want {len(want)}")
    for i, (got, exp) in enumerate(zip(estimates, want)):
        if canon(got) != canon(exp):
            raise Failure(
                f"{method} {what}: estimate {i} differs\n  chunked: {canon(got)}\n  single:  {canon(exp)}"
            )
    if canon(posterior) != canon(single["posterior"]):
        raise Failure(f"{method} {what}: final posterior differs")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--proxy", required=True, help="nginx base URL")
    ap.add_argument("--instance", nargs=2, required=True, metavar="HOST:PORT")
    ap.add_argument("--pid", nargs=2, type=int, required=True, help="pids of the instances, same order")
    args = ap.parse_args()
    addrs = args.instance
    pid_of = dict(zip(addrs, args.pid))
    direct = {a: f"http://{a}" for a in addrs}
    est_path = "/v1/estimate"

    for a in addrs:
        wait_healthy(direct[a])
    wait_healthy(args.proxy)
    lines = readings()
    chunks = [lines[i : i + CHUNK] for i in range(0, len(lines), CHUNK)]

    # Reference: the whole sequence in one request to one instance; the other instance
    # must give the very same answer (same binary, no state).
    singles = {}
    for method in FILTERS:
        one, _ = post(direct[addrs[0]] + est_path, request(method, PRIOR, lines))
        other, _ = post(direct[addrs[1]] + est_path, request(method, PRIOR, lines))
        if canon(one) != canon(other):
            raise Failure(f"{method}: the two instances answer the same request differently")
        if len(one["estimates"]) != LINES:
            raise Failure(f"{method}: {len(one['estimates'])} estimates for {LINES} lines")
        singles[method] = one
    print(f"reference: {LINES} lines, one request per method, both instances agree")

    # Part 1: chunks through nginx, alternating instances.
    for method in FILTERS:
        prior, estimates, served = PRIOR, [], []
        for chunk in chunks:
            answer, headers = post(args.proxy + est_path, request(method, prior, chunk))
            tried = upstreams(headers)
            if len(tried) != 1 or tried[0] not in addrs:
                raise Failure(f"{method}: unexpected upstream {tried} with both instances up")
            served.append(tried[0])
            estimates.extend(answer["estimates"])
            prior = answer["posterior"]
        for i in range(1, len(served)):
            if served[i] == served[i - 1]:
                raise Failure(f"{method}: chunks {i - 1} and {i} both went to {served[i]}: {served}")
        assert_same(method, singles[method], estimates, prior, "through nginx")
        print(f"{method}: {len(chunks)} chunks alternated over {sorted(set(served))}, bit-identical to one request")

    # Part 2: the three streams interleaved; after round KILL_AFTER, kill the instance
    # that nginx will pick next (round robin alternates, so it is the one that did not
    # serve the last chunk). The next chunk must fail over to the survivor.
    kill_after = 3
    state = {m: (PRIOR, []) for m in FILTERS}
    last = None
    killed = survivor = None
    retried = False
    for r, chunk in enumerate(chunks):
        if r == kill_after:
            killed = next(a for a in addrs if a != last)
            survivor = last
            os.kill(pid_of[killed], signal.SIGKILL)
            wait_refused(killed)
            print(f"killed the instance at {killed} (pid {pid_of[killed]}) after round {r}")
        for method in FILTERS:
            prior, estimates = state[method]
            answer, headers = post(args.proxy + est_path, request(method, prior, chunk))
            tried = upstreams(headers)
            if killed is None:
                if len(tried) != 1:
                    raise Failure(f"{method}: retried {tried} while both instances were up")
            else:
                if tried[-1] != survivor:
                    raise Failure(f"{method}: after the kill, served by {tried}, not {survivor}")
                if not retried:
                    # The first request after the kill went to the dead instance first.
                    if tried != [killed, survivor]:
                        raise Failure(f"{method}: first request after the kill tried {tried}, want [{killed}, {survivor}]")
                    retried = True
            last = tried[-1]
            estimates.extend(answer["estimates"])
            state[method] = (answer["posterior"], estimates)
    if not retried:
        raise Failure("no request was retried after the kill")
    for method in FILTERS:
        prior, estimates = state[method]
        assert_same(method, singles[method], estimates, prior, "across the kill")
        print(f"{method}: continued on the survivor after the kill, bit-identical to one request")
    print("statelessness: ok")


if __name__ == "__main__":
    try:
        main()
    except Failure as e:
        print(f"FAILED: {e}", file=sys.stderr)
        sys.exit(1)
