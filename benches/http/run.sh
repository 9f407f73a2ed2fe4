#!/usr/bin/env bash
# HTTP latency of one DPP request through the real server, JSON embeddings vs embedding_b64.
# Builds release, starts `medley serve` on loopback, drives it with wrk (Debian package; installed
# if missing) on one connection for DURATION seconds per body, and prints median/p90/p99.
# Usage: benches/http/run.sh [N D K] (default 500 64 50); DURATION=10 by default.
set -euo pipefail
cd "$(dirname "$0")/../.."
here=benches/http
dur="${DURATION:-10}"
command -v wrk >/dev/null || { sudo_=""; [ "$(id -u)" -ne 0 ] && sudo_=sudo; $sudo_ apt-get install -y -qq wrk >/dev/null; }
. loadtest/lib.sh
prepare
python3 $here/make_requests.py "$work" "$@"
ls -l "$work" | awk 'NR>1 {print $9, $5, "bytes"}'
start_medley "$bin" "$work/server.log" --listen 127.0.0.1:0 --admin-listen 127.0.0.1:0 --grpc-listen 127.0.0.1:0
for body in json b64; do
  BODY="$work/rerank-$body.json" wrk -t1 -c1 -d2s -s $here/post.lua "http://$addr/v1/rerank" >/dev/null  # warm-up
  printf '%-5s ' "$body"
  BODY="$work/rerank-$body.json" wrk -t1 -c1 -d"${dur}s" -s $here/post.lua "http://$addr/v1/rerank" | tail -1
done
