# Sourced by the shell tests (tests/client/run.sh, tests/fuzz/schema.sh, tests/multi/run.sh).
# tacit_start BIN LOG starts an open (no API keys) `tacit serve` on a loopback port the
# kernel picks at bind time (--addr 127.0.0.1:0) and reads that port back from the log:
# choosing a free port first and binding it later raced with other processes on a busy CI
# machine ("Address already in use"). It sets TACIT_PID and TACIT_PORT and returns once
# /healthz answers 200 (at most 20 s), or fails with the reason.
tacit_start() {
    local bin="$1" log="$2" tries
    env -u TACIT_API_KEYS -u TACIT_API_KEYS_FILE TACIT_LOG_FORMAT=text NO_COLOR=1 \
        "$bin" serve --addr 127.0.0.1:0 >"$log" 2>&1 &
    TACIT_PID=$!
    TACIT_PORT=""
    for ((tries = 0; tries < 200; tries++)); do
        TACIT_PORT="$(sed -n 's/.* listening addr=127\.0\.0\.1:\([0-9][0-9]*\).*/\1/p' "$log" | head -n 1)"
        [[ -n "$TACIT_PORT" ]] && break
        if ! kill -0 "$TACIT_PID" 2>/dev/null; then
            echo "tacit serve exited before listening (log: $log)" >&2
            return 1
        fi
        sleep 0.1
    done
    if [[ -z "$TACIT_PORT" ]]; then
        echo "tacit serve did not report its address within 20 s (log: $log)" >&2
        return 1
    fi
    python3 - "$TACIT_PORT" <<'PY'
import sys, time, urllib.request
url = f"http://127.0.0.1:{sys.argv[1]}/healthz"
for _ in range(200):
    try:
        with urllib.request.urlopen(url, timeout=1) as r:
            if r.status == 200:
                sys.exit(0)
    except OSError:
        time.sleep(0.1)
sys.exit(f"{url} did not answer within 20 s")
PY
}
