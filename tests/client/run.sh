#!/usr/bin/env bash
# Runs examples/client.py against a real `tacit serve` on a free loopback port, so the
# example in the repository is known to work with the server of the same commit.
#
# Usage: tests/client/run.sh [path/to/tacit]
#   Without an argument, builds with `cargo build --release --locked` and uses
#   $CARGO_TARGET_DIR/release/tacit (target/release/tacit by default).
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

log="$(mktemp)"
pid=""
cleanup() {
    local status=$?
    pid="${TACIT_PID:-$pid}"
    if [[ -n "$pid" ]]; then
        kill "$pid" 2>/dev/null || true
        wait "$pid" 2>/dev/null || true
    fi
    if [[ $status -ne 0 && -s "$log" ]]; then
        echo "---- server log (last 40 lines)" >&2
        tail -n 40 "$log" >&2
    fi
    rm -f "$log"
    exit "$status"
}
trap cleanup EXIT
trap 'exit 130' INT TERM

tacit_start "$bin" "$log"
port="$TACIT_PORT"

timeout 120 python3 examples/client.py "http://127.0.0.1:$port"
