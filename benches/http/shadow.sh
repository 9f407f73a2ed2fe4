#!/usr/bin/env bash
# Primary latency with a shadow at sample rate 1.0 vs 0.0, in one server run.
# One release server, two slices that differ only in the shadow's sample rate (dpp primary,
# mmr shadow); wrk on one connection, DURATION seconds each after a warm-up, same body.
set -euo pipefail
cd "$(dirname "$0")/../.."
here=benches/http
dur="${DURATION:-10}"
command -v wrk >/dev/null || { s=""; [ "$(id -u)" -ne 0 ] && s=sudo; $s apt-get install -y -qq wrk >/dev/null; }
cargo build --release --locked --bin medley -q
tmp="$(mktemp -d)"
python3 $here/make_requests.py "$tmp" "$@"
cat > "$tmp/shadow.toml" <<'TOML'
[slices.default]
algorithm = "dpp"
lambda = 0.3
[slices.on]
algorithm = "dpp"
lambda = 0.3
[slices.on.shadow]
algorithm = "mmr"
lambda = 0.5
sample_rate = 1.0
[slices.off]
algorithm = "dpp"
lambda = 0.3
[slices.off.shadow]
algorithm = "mmr"
lambda = 0.5
sample_rate = 0.0
TOML
for s in on off; do
  python3 -c "import json,sys; b=json.load(open('$tmp/rerank-b64.json')); b['slice']='$s'; json.dump(b, open('$tmp/$s.json','w'))"
done
log="$tmp/server.log"
target/release/medley serve --config "$tmp/shadow.toml" --listen 127.0.0.1:0 --admin-listen 127.0.0.1:0 2>"$log" &
pid=$!
trap 'kill $pid 2>/dev/null || true; rm -rf "$tmp"' EXIT
for _ in $(seq 1 100); do
  addr="$(sed -n 's/.* listen=\([0-9.:]*\).*/\1/p' "$log" | head -1)"
  admin="$(sed -n 's/.*admin_listen=\([0-9.:]*\).*/\1/p' "$log" | head -1)"
  [ -n "$addr" ] && break; sleep 0.1
done
for s in off on off on; do
  BODY="$tmp/$s.json" wrk -t1 -c1 -d2s -s $here/post.lua "http://$addr/v1/rerank" >/dev/null
  printf 'sample_rate=%s ' "$([ $s = on ] && echo 1.0 || echo 0.0)"
  BODY="$tmp/$s.json" wrk -t1 -c1 -d"${dur}s" -s $here/post.lua "http://$addr/v1/rerank" | tail -1
done
curl -s "http://$admin/metrics" | grep -E '^medley_shadow_(runs|dropped)_total'
