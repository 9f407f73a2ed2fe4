#!/usr/bin/env bash
# Primary latency with a shadow at sample rate 1.0 vs 0.0, in one server run.
# One release server, two slices that differ only in the shadow's sample rate (dpp primary,
# mmr shadow); wrk on one connection, DURATION seconds each after a warm-up, same body.
set -euo pipefail
cd "$(dirname "$0")/../.."
here=benches/http
dur="${DURATION:-10}"
command -v wrk >/dev/null || { s=""; [ "$(id -u)" -ne 0 ] && s=sudo; $s apt-get install -y -qq wrk >/dev/null; }
. loadtest/lib.sh
prepare
tmp="$work"
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
start_medley "$bin" "$tmp/server.log" --config "$tmp/shadow.toml" --listen 127.0.0.1:0 --admin-listen 127.0.0.1:0 --grpc-listen 127.0.0.1:0
for s in off on off on; do
  BODY="$tmp/$s.json" wrk -t1 -c1 -d2s -s $here/post.lua "http://$addr/v1/rerank" >/dev/null
  printf 'sample_rate=%s ' "$([ $s = on ] && echo 1.0 || echo 0.0)"
  BODY="$tmp/$s.json" wrk -t1 -c1 -d"${dur}s" -s $here/post.lua "http://$addr/v1/rerank" | tail -1
done
curl -s "http://$admin/metrics" | grep -E '^medley_shadow_(runs|dropped)_total'
