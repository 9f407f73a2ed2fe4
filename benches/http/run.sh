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
cargo build --release --locked --bin medley -q
tmp="$(mktemp -d)"
python3 $here/make_requests.py "$tmp" "$@"
ls -l "$tmp" | awk 'NR>1 {print $9, $5, "bytes"}'
log="$tmp/server.log"
target/release/medley serve --listen 127.0.0.1:0 --admin-listen 127.0.0.1:0 2>"$log" &
pid=$!
trap 'kill $pid 2>/dev/null || true; rm -rf "$tmp"' EXIT
for _ in $(seq 1 100); do addr="$(sed -n 's/.* listen=\([0-9.:]*\).*/\1/p' "$log" | head -1)"; [ -n "$addr" ] && break; sleep 0.1; done
for body in json b64; do
  BODY="$tmp/rerank-$body.json" wrk -t1 -c1 -d2s -s $here/post.lua "http://$addr/v1/rerank" >/dev/null  # warm-up
  printf '%-5s ' "$body"
  BODY="$tmp/rerank-$body.json" wrk -t1 -c1 -d"${dur}s" -s $here/post.lua "http://$addr/v1/rerank" | tail -1
done
