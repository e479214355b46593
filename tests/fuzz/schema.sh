#!/usr/bin/env bash
# Schema-driven fuzzing: schemathesis generates requests from openapi/openapi.yaml and
# sends them to a real `tacit serve` (open: no API keys) on a free loopback port. It fails
# on any 5xx, any answer whose media type the schema does not list for its status (every
# error is application/problem+json), and any answer whose body does not conform.
#
# Usage: tests/fuzz/schema.sh [path/to/tacit]
#   Without an argument, builds with `cargo build --release --locked`.
#   Environment: SCHEMATHESIS (the `schemathesis` command; default: a venv made under
#   $TACIT_FUZZ_VENV, default target/fuzz-venv, with SCHEMATHESIS_VERSION, by default the
#   version pinned in .ci/run),
#   FUZZ_EXAMPLES (examples per operation, default 200). Generation is deterministic.
set -euo pipefail

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
cd "$root"
# shellcheck source=../support/serve.sh
. "$root/tests/support/serve.sh"

# The pin lives in .ci/run (`schemathesis_version=`); change it there only.
version="${SCHEMATHESIS_VERSION:-$(sed -n 's/^schemathesis_version=//p' .ci/run)}"
[[ -n "$version" ]] || { echo "no schemathesis version pinned in .ci/run" >&2; exit 1; }

target="${CARGO_TARGET_DIR:-target}"
[[ "$target" = /* ]] || target="$root/$target"
bin="${1:-}"
if [[ -z "$bin" ]]; then
    cargo build --release --locked
    bin="$target/release/tacit"
fi
[[ -x "$bin" ]] || { echo "not an executable: $bin" >&2; exit 1; }

st="${SCHEMATHESIS:-}"
if [[ -z "$st" ]]; then
    venv="${TACIT_FUZZ_VENV:-$target/fuzz-venv}"
    if ! "$venv/bin/schemathesis" --version 2>/dev/null | grep -q "$version"; then
        python3 -m venv "$venv"
        "$venv/bin/pip" install --quiet --disable-pip-version-check "schemathesis==$version"
    fi
    st="$venv/bin/schemathesis"
fi

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

# The hooks (tests/fuzz/hooks.py) send the stream's generated line as NDJSON.
# No "examples" phase: the documented examples are checked against live answers by
# tests/openapi.rs, and schemathesis 4.32.5 on Python 3.11 failed inside itself at random
# while turning our deep example schemas into strategies ("AST constructor recursion depth
# mismatch"), which a recursion limit does not cure.
# One worker: with two, schemathesis's threads compiled Python code at the same time and
# CPython 3.11.7 failed with the same "AST constructor recursion depth mismatch" in the
# coverage phase of POST /v1/check (CI, 2026-12-03). From memory, CPython's AST recursion
# counter was not safe across threads in 3.11 (issue gh-106905); one worker avoids it.
# Deterministic generation (no random seed), so a failure in CI reproduces locally;
# deterministic mode also keeps no example database, so earlier runs do not change this one.
SCHEMATHESIS_HOOKS=hooks PYTHONPATH="$root/tests/fuzz${PYTHONPATH:+:$PYTHONPATH}" \
"$st" run openapi/openapi.yaml \
    --url "http://127.0.0.1:$port" \
    --checks not_a_server_error,content_type_conformance,response_schema_conformance \
    --max-examples "${FUZZ_EXAMPLES:-200}" \
    --generation-deterministic \
    --phases coverage,fuzzing \
    --workers 1 \
    --request-timeout 30 \
    --no-color
