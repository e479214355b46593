#!/usr/bin/env bash
# Proof of statelessness with real parts: two `tacit serve` processes behind nginx (round
# robin on loopback), driven by tests/multi/check.py, which sends chunked streams through
# nginx, checks they alternate instances and match one direct request bit for bit, then
# kills one instance mid-run and checks the retried chunk continues on the survivor.
#
# Usage: tests/multi/run.sh [path/to/tacit]
#   Without an argument, builds with `cargo build --release --locked` and uses
#   $CARGO_TARGET_DIR/release/tacit (target/release/tacit by default).
# Needs nginx (Debian: apt-get install -y nginx; .ci/run installs it) and python3.
# Everything listens on 127.0.0.1 only; every process started here is stopped on exit.
set -euo pipefail

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
cd "$root"
# shellcheck source=../support/serve.sh
. "$root/tests/support/serve.sh"

bin="${1:-}"
if [[ -z "$bin" ]]; then
    cargo build --release --locked
    target="${CARGO_TARGET_DIR:-target}"
    [[ "$target" = /* ]] || target="$root/$target"
    bin="$target/release/tacit"
fi
[[ -x "$bin" ]] || { echo "not an executable: $bin" >&2; exit 1; }

nginx_bin="$(command -v nginx || true)"
[[ -n "$nginx_bin" ]] || nginx_bin=/usr/sbin/nginx
[[ -x "$nginx_bin" ]] || { echo "nginx not found (apt-get install -y nginx)" >&2; exit 1; }

work="$(mktemp -d)"
pids=()
cleanup() {
    local status=$?
    for pid in "${pids[@]}"; do
        kill "$pid" 2>/dev/null || true
    done
    for pid in "${pids[@]}"; do
        wait "$pid" 2>/dev/null || true
    done
    if [[ $status -ne 0 ]]; then
        for log in "$work"/*.log; do
            [[ -s "$log" ]] || continue
            echo "---- $(basename "$log") (last 40 lines)" >&2
            tail -n 40 "$log" >&2
        done
    fi
    rm -rf "$work"
    exit "$status"
}
trap cleanup EXIT
trap 'exit 130' INT TERM

# Each instance binds a port the kernel picks (tests/support/serve.sh); its pid joins `pids`
# as soon as it starts, so cleanup stops it even if it never becomes healthy.
ports=()
for name in a b; do
    TACIT_PID=""
    tacit_start "$bin" "$work/tacit-$name.log" || { [[ -n "$TACIT_PID" ]] && pids+=("$TACIT_PID"); exit 1; }
    pids+=("$TACIT_PID")
    ports+=("$TACIT_PORT")
done
port_a="${ports[0]}"
port_b="${ports[1]}"
pid_a="${pids[0]}"
pid_b="${pids[1]}"

mkdir -p "$work/nginx"
# nginx needs its port in the config, so it is chosen first; if something takes it before
# nginx binds it, nginx exits and the next attempt uses a fresh port.
start_nginx() {
    port_lb="$(python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])')"
    cat >"$work/nginx/nginx.conf" <<EOF
    # One worker: round-robin state lives per worker, so one worker alternates strictly.
    worker_processes 1;
    daemon off;
    pid $work/nginx/nginx.pid;
    error_log $work/nginx-error.log warn;
    events { worker_connections 64; }
    http {
        access_log $work/nginx-access.log;
        client_body_temp_path $work/nginx/body;
        proxy_temp_path $work/nginx/proxy;
        fastcgi_temp_path $work/nginx/fastcgi;
        uwsgi_temp_path $work/nginx/uwsgi;
        scgi_temp_path $work/nginx/scgi;
        # Keep bodies and answers in memory: nothing here should touch the temp paths.
        client_max_body_size 16m;
        client_body_buffer_size 16m;
        proxy_buffer_size 64k;
        proxy_buffers 64 64k;
        proxy_max_temp_file_size 0;

        upstream tacit {
            server 127.0.0.1:$port_a;
            server 127.0.0.1:$port_b;
        }
        server {
            listen 127.0.0.1:$port_lb;
            location / {
                proxy_pass http://tacit;
                proxy_http_version 1.1;
                proxy_set_header Connection "";
                proxy_connect_timeout 2s;
                proxy_read_timeout 60s;
                # A dead instance refuses the connection: try the other one. POST is retried
                # too (non_idempotent) because an estimate is a pure function of its body.
                proxy_next_upstream error timeout http_502 non_idempotent;
                proxy_next_upstream_tries 2;
                # Which instance(s) served the request, for check.py.
                add_header X-Upstream \$upstream_addr always;
            }
        }
    }
EOF
    "$nginx_bin" -t -p "$work/nginx/" -c "$work/nginx/nginx.conf" -e "$work/nginx-error.log" \
        >"$work/nginx-test.log" 2>&1 || { cat "$work/nginx-test.log" >&2; exit 1; }
    "$nginx_bin" -p "$work/nginx/" -c "$work/nginx/nginx.conf" -e "$work/nginx-error.log" \
        >"$work/nginx-stdout.log" 2>&1 &
    nginx_pid=$!
    # Up when its port accepts a connection; failed when it exited first (port taken).
    python3 - "$port_lb" "$nginx_pid" <<'PY'
import os, socket, sys, time
port, pid = int(sys.argv[1]), int(sys.argv[2])
for _ in range(100):
    try:
        socket.create_connection(("127.0.0.1", port), timeout=1).close()
        sys.exit(0)
    except OSError:
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            sys.exit(1)
        time.sleep(0.1)
sys.exit(1)
PY
}
for attempt in 1 2 3 4 5; do
    if start_nginx; then
        pids+=("$nginx_pid")
        break
    fi
    kill "$nginx_pid" 2>/dev/null || true
    wait "$nginx_pid" 2>/dev/null || true
    echo "nginx could not listen on 127.0.0.1:$port_lb (attempt $attempt)" >&2
    [[ $attempt -lt 5 ]] || exit 1
done

echo "tacit at 127.0.0.1:$port_a (pid $pid_a) and 127.0.0.1:$port_b (pid $pid_b); nginx at 127.0.0.1:$port_lb"
# Bounded: check.py waits at most 20 s for each server and 30 s for each request.
timeout 300 python3 "$root/tests/multi/check.py" \
    --proxy "http://127.0.0.1:$port_lb" \
    --instance "127.0.0.1:$port_a" "127.0.0.1:$port_b" \
    --pid "$pid_a" "$pid_b"
