#!/usr/bin/env bash
# A long NDJSON stream (default 10,000,000 lines) through POST /v1/estimate/stream,
# sampling the server's resident memory (VmRSS) every second. Target: under 100 MB and
# flat (the last samples no higher than the early ones, give or take allocator noise).
#   LINES=10000000 benches/load/stream_rss.sh
source "$(dirname "$0")/common.sh"
LINES="${LINES:-10000000}"
build
start_server
SAMPLES="$(mktemp /tmp/tacit-rss.XXXXXX.txt)"
(
  while kill -0 "$SERVER_PID" 2>/dev/null; do
    awk '/VmRSS/ {print $2}' "/proc/$SERVER_PID/status" >>"$SAMPLES" 2>/dev/null || true
    sleep 1
  done
) &
SAMPLER=$!
load_note
start=$(date +%s.%N)
python3 "$HERE/gen.py" stream "$LINES" |
  curl -sS -X POST -T - -H 'content-type: application/x-ndjson' "$URL/v1/estimate/stream" |
  python3 -c '
import sys
n = 0
last = b""
for line in sys.stdin.buffer:
    n += 1
    last = line
print("answer lines:", n)
print("last line:", last[:300].decode(errors="replace"))
'
end=$(date +%s.%N)
kill "$SAMPLER" 2>/dev/null || true
python3 - "$SAMPLES" "$LINES" "$start" "$end" <<'PY'
import sys
kb = [int(x) for x in open(sys.argv[1]) if x.strip()]
lines, secs = int(sys.argv[2]), float(sys.argv[4]) - float(sys.argv[3])
if not kb:
    sys.exit("no RSS samples")
q = max(1, len(kb) // 4)
print(f"{lines:,} lines in {secs:.1f} s ({lines / secs:,.0f} lines/s)")
print(f"VmRSS: max {max(kb) / 1024:.1f} MB, first quarter max {max(kb[:q]) / 1024:.1f} MB, "
      f"last quarter max {max(kb[-q:]) / 1024:.1f} MB over {len(kb)} samples")
if max(kb) > 100 * 1024:
    sys.exit("FAIL: resident memory above 100 MB")
PY
load_note
rm -f "$SAMPLES"
