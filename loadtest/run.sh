#!/usr/bin/env bash
# medley's loadtest, in one command: builds release, writes a demo corpus with `medley sample`,
# starts `medley serve` on loopback, finds the saturation throughput, then drives fixed rates
# below it with oha (an existing HTTP load generator, from crates.io; installed here if missing)
# and prints p50/p95/p99, throughput, errors and the server's RSS before and after.
#
#   loadtest/run.sh                    # the table (about 2 minutes after the build)
#   loadtest/run.sh --soak 10          # then 10 minutes at half the saturation rate:
#                                      # fails unless errors stay 0 and RSS stays flat
#   loadtest/run.sh --overload         # then 2x saturation on 256 connections (past
#                                      # max_in_flight = 64): shed rate, p99 of the accepted
#                                      # requests, and the half-rate step again right after
#   N=500 D=64 K=50 ALGO=mmr loadtest/run.sh --duration 5
#   EXPOSURE=1 loadtest/run.sh         # exposure log on at this sample rate (0, the default: off);
#                                      # EXPOSURE_COMPRESS=1 writes it zstd-compressed
#
# Defaults: N=200 candidates, D=64 dims, K=20, ALGO=dpp, LAMBDA=0.5; embeddings sent as
# embedding_b64; CONNS=32 connections. Latencies at fixed rates are corrected for coordinated
# omission (oha --latency-correction: each request is timed from when it was due, not sent).
# Bounded: every step has a fixed duration and the server is stopped on exit. Loopback only.
set -euo pipefail
cd "$(dirname "$0")/.."
. loadtest/lib.sh

duration=10
soak=0
overload=0
while [ $# -gt 0 ]; do
  case "$1" in
    --duration) duration="$2"; shift 2 ;;
    --soak) soak="$2"; shift 2 ;;
    --overload) overload=1; shift ;;
    -h|--help) sed -n '2,21p' "$0"; exit 0 ;;
    *) echo "unknown argument $1 (see --help)" >&2; exit 2 ;;
  esac
done
N="${N:-200}" D="${D:-64}" K="${K:-20}" ALGO="${ALGO:-dpp}" LAMBDA="${LAMBDA:-0.5}" CONNS="${CONNS:-32}"
EXPOSURE="${EXPOSURE:-0}" EXPOSURE_COMPRESS="${EXPOSURE_COMPRESS:-0}"

if ! command -v oha >/dev/null; then
  echo "installing oha from crates.io (once; a few minutes)" >&2
  cargo install oha --locked --quiet
fi
prepare

$bin sample --requests 1000 --candidates "$N" --dim "$D" --seed 7 --b64 > "$work/corpus.jsonl"
cat > "$work/medley.toml" <<EOF
[server]
listen = "127.0.0.1:0"
admin_listen = "127.0.0.1:0"
grpc_listen = "127.0.0.1:0"
# About 10 ms of work at this box's saturation rate (Little's law: 5 000 req/s x 12 ms); past it
# medley sheds with 503 instead of queueing.
max_in_flight = 64

[slices.default]
algorithm = "$ALGO"
lambda = $LAMBDA
k = $K
EOF
if [ "$EXPOSURE" != 0 ]; then
  printf '\n[exposure_log]\ndir = "%s"\nsample_rate = %s\ncompress = %s\n' "$work/exposure" "$EXPOSURE" \
    "$([ "$EXPOSURE_COMPRESS" = 1 ] && echo true || echo false)" >> "$work/medley.toml"
fi
$bin check-config "$work/medley.toml" >/dev/null
start_medley "$bin" "$work/server.log" --config "$work/medley.toml"
url="http://$addr/v1/rerank"

rss_kib() { awk '/^VmRSS/ {print $2}' "/proc/$server_pid/status"; }
# One oha run: drive [extra oha args...] for SECONDS, write the JSON report to FILE.
drive() {
  local seconds="$1" file="$2"; shift 2
  oha --no-tui --output-format json -z "${seconds}s" -c "$CONNS" -m POST -T application/json \
      -w -Z "$work/corpus.jsonl" "$@" "$url" > "$file"
}
# A table row from a report: label, target rate, achieved rate, p50/p95/p99 in ms, errors, RSS.
row() {
  python3 - "$1" "$2" "$3" "$(rss_kib)" <<'PY'
import json, sys
label, target, path, rss = sys.argv[1], sys.argv[2], sys.argv[3], int(sys.argv[4])
r = json.load(open(path))
s, p = r["summary"], r["latencyPercentiles"]
codes = r.get("statusCodeDistribution", {})
ok = codes.get("200", 0)
errors = sum(codes.values()) - ok + sum(r.get("errorDistribution", {}).values())
if errors: print(f"errors in {label}: codes {codes}, {r.get('errorDistribution')}", file=sys.stderr)
ms = lambda k: f"{1000 * (p.get(k) or 0):.2f}"
print(f"| {label} | {target} | {s['requestsPerSec']:.0f} | {ms('p50')} | {ms('p95')} | {ms('p99')} | {errors} | {rss / 1024:.0f} |")
PY
}
rate_of() { python3 -c 'import json,sys; print(int(json.load(open(sys.argv[1]))["summary"]["requestsPerSec"]))' "$1"; }

echo "medley loadtest: N=$N d=$D k=$K $ALGO lambda=$LAMBDA, embedding_b64, $CONNS connections, ${duration}s per step, exposure log sample_rate $EXPOSURE (compress $EXPOSURE_COMPRESS)"
echo "machine: $(nproc) cores, $(awk -F': ' '/model name/ {print $2; exit}' /proc/cpuinfo), oha $(oha --version | awk '{print $2}'), load generator on the same box"
rss_before="$(rss_kib)"
drive 3 "$work/warmup.json"
echo
echo "| step | target req/s | achieved req/s | p50 ms | p95 ms | p99 ms | errors | server RSS MiB |"
echo "|---|---|---|---|---|---|---|---|"
drive "$duration" "$work/sat.json"
row "saturation ($CONNS connections, no rate limit)" "max" "$work/sat.json"
sat="$(rate_of "$work/sat.json")"
for pct in 25 50 75 90; do
  rate=$(( sat * pct / 100 ))
  [ "$rate" -ge 1 ] || continue
  drive "$duration" "$work/q$pct.json" -q "$rate" --latency-correction
  row "${pct}% of saturation" "$rate" "$work/q$pct.json"
done
if [ "$overload" -eq 1 ]; then
  rate=$(( sat * 2 ))
  CONNS=256 drive "$duration" "$work/over.json" -q "$rate" --latency-correction --stats-success-breakdown
  python3 - "$rate" "$work/over.json" "$(rss_kib)" <<'PY'
import json, sys
rate, path, rss = int(sys.argv[1]), sys.argv[2], int(sys.argv[3])
r = json.load(open(path))
codes = r.get("statusCodeDistribution", {})
total = sum(codes.values())
ok, shed = codes.get("200", 0), codes.get("503", 0)
other = total - ok - shed + sum(r.get("errorDistribution", {}).values())
p = r.get("latencyPercentilesSuccessful") or {}
ms = lambda k: f"{1000 * (p.get(k) or 0):.2f}"
print(f"| 2x saturation, 256 connections (accepted only) | {rate} | {ok / r['summary']['total']:.0f} | {ms('p50')} | {ms('p95')} | {ms('p99')} | {other} | {rss / 1024:.0f} |")
print(f"overload: {total} answered, {ok} served (200), {shed} shed (503, {100 * shed / max(total, 1):.1f}%), {other} other errors", file=sys.stderr)
if other:
    print(f"other errors: codes {codes}, {r.get('errorDistribution')}", file=sys.stderr)
PY
  rate=$(( sat / 2 ))
  drive "$duration" "$work/after.json" -q "$rate" --latency-correction
  row "50% again, right after the overload" "$rate" "$work/after.json"
fi
rss_after="$(rss_kib)"
echo
echo "server RSS: $(( rss_before / 1024 )) MiB before, $(( rss_after / 1024 )) MiB after"
if [ "$EXPOSURE" != 0 ]; then
  sleep 1
  python3 - "http://$admin/metrics" <<'PY'
import sys, urllib.request
text = urllib.request.urlopen(sys.argv[1]).read().decode()
get = lambda name: next((l.split()[-1] for l in text.splitlines() if l.startswith(name + " ")), "?")
print(f"exposure log: {get('medley_exposure_log_records_total')} records written, "
      f"{get('medley_exposure_log_dropped_total')} dropped on a full queue, "
      f"{get('medley_exposure_log_write_errors_total')} lost to write errors")
PY
  echo "exposure files: $(du -sb "$work/exposure" | cut -f1) bytes"
fi

if [ "$soak" -gt 0 ]; then
  rate=$(( sat / 2 ))
  echo
  echo "soak: $soak minute(s) at $rate req/s (half saturation), one row per minute"
  echo "| minute | target req/s | achieved req/s | p50 ms | p95 ms | p99 ms | errors | server RSS MiB |"
  echo "|---|---|---|---|---|---|---|---|"
  first="" last="" total_errors=0
  for m in $(seq 1 "$soak"); do
    drive 60 "$work/soak.json" -q "$rate" --latency-correction
    line="$(row "$m" "$rate" "$work/soak.json")"
    echo "$line"
    errors="$(echo "$line" | awk -F'|' '{gsub(/ /, "", $8); print $8}')"
    total_errors=$(( total_errors + errors ))
    last="$(rss_kib)"
    [ -n "$first" ] || first="$last"
  done
  # Flat: the last minute's RSS within 10% (plus 8 MiB of allocator slack) of the first minute's.
  limit=$(( first + first / 10 + 8192 ))
  echo "soak: errors $total_errors; RSS $(( first / 1024 )) MiB after minute 1, $(( last / 1024 )) MiB at the end (limit $(( limit / 1024 )) MiB)"
  if [ "$total_errors" -ne 0 ] || [ "$last" -gt "$limit" ]; then
    echo "soak FAILED" >&2
    exit 1
  fi
  echo "soak passed"
fi
