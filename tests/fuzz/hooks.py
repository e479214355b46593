"""Schemathesis hooks for tests/fuzz/schema.sh: the NDJSON stream's request body.

The schema describes one line of /v1/estimate/stream (StreamRequestLine); a generated line
is sent as one JSON document and a newline, which is what the stream reads.
"""

import json

import schemathesis


@schemathesis.serializer("application/x-ndjson")
def ndjson(ctx, value):
    if isinstance(value, bytes):
        return value
    if isinstance(value, str):
        return value.encode("utf-8")
    return (json.dumps(value, allow_nan=False) + "\n").encode("utf-8")
