# Shared by the load scripts: build the release binary, start it on a loopback port, and
# stop it on exit. Source it; it sets ROOT, BIN, PORT, URL and SERVER_PID.
set -euo pipefail
HERE="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
ROOT="$(cd "$HERE/../.." && pwd)"
PORT="${PORT:-18181}"
URL="http://127.0.0.1:$PORT"
TARGET="${CARGO_TARGET_DIR:-$ROOT/target}"
BIN="${BIN:-$TARGET/release/tacit}"

build() {
  # SKIP_BUILD=1 with BIN=... runs an existing binary (e.g. a debug build, to try the script).
  if [ -z "${SKIP_BUILD:-}" ]; then
    (cd "$ROOT" && cargo build --release --bin tacit)
  fi
}

start_server() {
  # Extra flags (limits) may be passed as arguments.
  RUST_LOG="${RUST_LOG:-warn}" "$BIN" serve --addr "127.0.0.1:$PORT" "$@" &
  SERVER_PID=$!
  trap 'kill "$SERVER_PID" 2>/dev/null || true; wait "$SERVER_PID" 2>/dev/null || true' EXIT
  for _ in $(seq 1 100); do
    if curl -fsS "$URL/healthz" >/dev/null 2>&1; then return 0; fi
    sleep 0.1
  done
  echo "server did not come up on $URL" >&2
  exit 1
}

load_note() {
  # The machine is shared: every figure is printed with the load average beside it.
  echo "load average: $(cut -d' ' -f1-3 /proc/loadavg) on $(nproc) cores"
}

server_cpu_secs() {
  # User + system CPU seconds the server has used so far (from /proc, clock ticks).
  awk -v hz="$(getconf CLK_TCK)" '{printf "%.2f", ($14 + $15) / hz}' "/proc/$SERVER_PID/stat"
}
