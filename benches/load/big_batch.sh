#!/usr/bin/env bash
# One POST /v1/estimate of N readings (default 1,000,000) of a 1-axis constant-velocity
# model with full output, timed end to end with curl (JSON parsing and writing included).
# Target: >= 1 million readings/s.
#   N=1000000 benches/load/big_batch.sh
# ANSWER=/dev/null discards the 367 MB answer instead of saving it to a temporary file:
# saving costs curl (on the same two cores) about half a second of CPU that is not the
# server's; both figures are reported in README.md.
source "$(dirname "$0")/common.sh"
N="${N:-1000000}"
build
BODY="$(mktemp /tmp/tacit-batch.XXXXXX.json)"
OUT="${ANSWER:-$(mktemp /tmp/tacit-batch-out.XXXXXX.json)}"
python3 "$HERE/gen.py" batch "$N" >"$BODY"
echo "body: $(stat -c %s "$BODY") bytes, $N readings"
start_server --max-lines "$((N + 1))" --max-body-bytes "$(( $(stat -c %s "$BODY") + 1024 ))"
load_note
cpu0=$(server_cpu_secs)
read -r code secs size < <(curl -s -o "$OUT" -w '%{http_code} %{time_total} %{size_download}\n' \
  -H 'content-type: application/json' --data-binary @"$BODY" "$URL/v1/estimate")
if [ "$code" != 200 ]; then
  echo "answered $code:" >&2
  # With ANSWER=/dev/null the problem was discarded: ask again (a failure answers fast).
  curl -s -H 'content-type: application/json' --data-binary @"$BODY" "$URL/v1/estimate" | head -c 2000 >&2
  exit 1
fi
cpu1=$(server_cpu_secs)
python3 - "$N" "$secs" "$size" "$cpu0" "$cpu1" <<'PY'
import sys
n, secs, size = int(sys.argv[1]), float(sys.argv[2]), int(sys.argv[3])
cpu = float(sys.argv[5]) - float(sys.argv[4])
print(f"{secs:.3f} s end to end, {n / secs:,.0f} readings/s, answer {size:,} bytes")
print(f"server CPU {cpu:.2f} s ({n / cpu:,.0f} readings per CPU second)")
PY
load_note
rm -f "$BODY"
if [ -z "${ANSWER:-}" ]; then rm -f "$OUT"; fi
