#!/usr/bin/env bash
# Peak memory under the largest requests the default limits allow, k = 1 000 (max_k) and bodies
# just under max_body_bytes (16 MiB) of embedding_b64, in two shapes:
#   - 10 000 candidates (max_candidates) at d = 288, the widest that fits: DPP's kernel is
#     exhausted after 288 picks (rank d) and fills the rest by score;
#   - 3 000 candidates at d = 1 000: DPP runs all 1 000 steps, its largest working set.
# (d = 4 096 is allowed too, with fewer candidates: the body limit binds first.) One fresh
# server per run, so each peak (VmHWM) is that run's own.
# The deadline is raised to 10 minutes so every kernel runs to its end; with the default 1 s the
# larger ones answer 503 deadline_exceeded instead.
#
#   loadtest/largest.sh            # about 1 minute after the build
set -euo pipefail
cd "$(dirname "$0")/.."
. loadtest/lib.sh
prepare
echo "machine: $(nproc) cores, $(awk -F': ' '/model name/ {print $2; exit}' /proc/cpuinfo)"

for shape in "10000 288" "3000 1000"; do
set -- $shape
python3 - "$work/largest.json" "$1" "$2" <<'PY'
import base64, json, random, struct, sys
rng = random.Random(5)
n, d = int(sys.argv[2]), int(sys.argv[3])
cands = []
for i in range(n):
    e = [rng.gauss(0, 1) for _ in range(d)]
    cands.append({"id": f"item-{i:05d}", "score": rng.random(), "category": f"cat-{i % 12}",
                  "embedding_b64": base64.b64encode(struct.pack(f"<{d}f", *e)).decode()})
json.dump({"candidates": cands, "k": 1000, "lambda": 0.5}, open(sys.argv[1], "w"))
PY
bytes=$(stat -c %s "$work/largest.json")
echo
echo "N = $1, d = $2 (embedding_b64), k = 1 000: body $bytes bytes (limit 16 777 216)"
echo
echo "| algorithm | status | seconds | peak RSS MiB | RSS after MiB |"
echo "|---|---|---|---|---|"
for algo in relevance quota mmr dpp; do
  cat > "$work/medley.toml" <<EOF
[server]
listen = "127.0.0.1:0"
admin_listen = "127.0.0.1:0"
grpc_listen = "127.0.0.1:0"
request_timeout_ms = 600000

[slices.default]
algorithm = "$algo"
EOF
  start_medley "$bin" "$work/server.log" --config "$work/medley.toml"
  out="$(curl -s -o /dev/null -w '%{http_code} %{time_total}' -H 'content-type: application/json' \
        --data-binary @"$work/largest.json" "http://$addr/v1/rerank")"
  peak=$(awk '/^VmHWM/ {print $2}' "/proc/$server_pid/status")
  now=$(awk '/^VmRSS/ {print $2}' "/proc/$server_pid/status")
  printf '| %s | %s | %s | %d | %d |\n' "$algo" "${out%% *}" "${out##* }" $((peak / 1024)) $((now / 1024))
  kill "$server_pid"; wait "$server_pid" 2>/dev/null || true
  server_pid=""
done
done
