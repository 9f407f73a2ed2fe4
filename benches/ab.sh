#!/usr/bin/env bash
# Interleaved A/B of two builds of core/examples/profile_dpp: runs OLD and NEW alternately ROUNDS
# times on one shape and prints both medians and their ratio. Alternating spreads the VM's slow
# spells over both sides, which criterion runs minutes apart do not; use it for changes of a few
# per cent. Build each side with `cargo build --release -p medley-core --example profile_dpp` and copy the binary.
#
#   benches/ab.sh OLD NEW ROUNDS [N D K [clustered]]
set -euo pipefail
[ $# -ge 3 ] || { sed -n '2,7p' "$0" >&2; exit 2; }
old="$1" new="$2" rounds="$3"
shift 3
for _ in $(seq "$rounds"); do
  echo "old $("$old" "$@")"
  echo "new $("$new" "$@")"
done | python3 -c '
import re, statistics, sys
unit = {"ns": 1e-3, "µs": 1.0, "us": 1.0, "ms": 1e3, "s": 1e6}
runs = {"old": [], "new": []}
for line in sys.stdin:
    side, rest = line.split(" ", 1)
    value, u = re.match(r"([\d.]+)(\D+) per call", rest).groups()
    runs[side].append(float(value) * unit[u])
o, n = statistics.median(runs["old"]), statistics.median(runs["new"])
rounds = len(runs["new"])
print(f"old {o:.1f} µs  new {n:.1f} µs  new/old {n / o:.3f}  ({rounds} rounds each)")
'
