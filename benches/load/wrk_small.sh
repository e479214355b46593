#!/usr/bin/env bash
# Small single-step estimate requests with wrk: 64 connections for 60 s by default.
# Target on the 2-core machine: >= 20,000 requests/s, p99 < 10 ms, 0 errors.
#   CONNECTIONS=64 DURATION=60s THREADS=2 benches/load/wrk_small.sh
source "$(dirname "$0")/common.sh"
CONNECTIONS="${CONNECTIONS:-64}"
DURATION="${DURATION:-60s}"
THREADS="${THREADS:-2}"

if ! command -v wrk >/dev/null; then
  apt-get update -qq && apt-get install -y -qq wrk
fi
build
BODY_FILE="$(mktemp /tmp/tacit-small.XXXXXX.json)"
python3 "$HERE/gen.py" small >"$BODY_FILE"
export BODY_FILE
start_server --max-concurrency "${MAX_CONCURRENCY:-256}"

# A single request first: a wrong body would otherwise show up only as "status errors".
code=$(curl -s -o /tmp/tacit-small.out -w '%{http_code}' -H 'content-type: application/json' \
  --data-binary @"$BODY_FILE" "$URL/v1/estimate")
if [ "$code" != 200 ]; then
  echo "the sample request answered $code:" >&2; cat /tmp/tacit-small.out >&2; exit 1
fi

load_note
cpu0=$(server_cpu_secs)
wrk -t"$THREADS" -c"$CONNECTIONS" -d"$DURATION" --latency -s "$HERE/small_estimate.lua" \
  "$URL/v1/estimate" | tee /tmp/tacit-wrk.txt
cpu1=$(server_cpu_secs)
reqs=$(grep -oE '^ +[0-9]+ requests in' /tmp/tacit-wrk.txt | grep -oE '[0-9]+')
# Server CPU per request: the figure that does not depend on what else the shared machine runs.
python3 -c "print(f'server CPU per request: {($cpu1 - $cpu0) / $reqs * 1e6:.0f} us')"
load_note
if grep -q "Non-2xx" /tmp/tacit-wrk.txt; then
  echo "FAIL: some answers were not 2xx" >&2; exit 1
fi
rm -f "$BODY_FILE"
