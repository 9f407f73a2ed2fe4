# Shared by the loadtest and HTTP bench scripts; source it, do not run it.

# start_medley BIN LOG [ARGS...]: starts `BIN serve ARGS...` in the background, logging to LOG,
# and waits (up to 10 s) for the addresses it binds. Sets server_pid, addr (public), admin
# (private) and grpc (gRPC, or "off"); exits 1 with the log if the server never says where it
# listens.
start_medley() {
  local bin="$1" log="$2"
  shift 2
  : > "$log"
  "$bin" serve "$@" 2> "$log" &
  server_pid=$!
  addr=""
  admin=""
  for _ in $(seq 1 100); do
    addr="$(sed -n 's/.* listen=\([0-9.:]*\).*/\1/p' "$log" | head -1)"
    admin="$(sed -n 's/.* admin_listen=\([0-9.:]*\).*/\1/p' "$log" | head -1)"
    grpc="$(sed -n 's/.* grpc_listen=\([0-9.:]*\|off\).*/\1/p' "$log" | head -1)"
    [ -n "$addr" ] && [ -n "$admin" ] && return 0
    sleep 0.1
  done
  echo "the server did not start:" >&2
  cat "$log" >&2
  exit 1
}

# prepare: builds the release binary and sets bin, a scratch dir in work, and an EXIT trap that
# stops the server (server_pid) and removes the scratch dir.
prepare() {
  cargo build --release --locked --bin medley --quiet
  bin=target/release/medley
  work="$(mktemp -d)"
  server_pid=""
  trap '[ -n "$server_pid" ] && kill "$server_pid" 2>/dev/null; wait 2>/dev/null; rm -rf "$work"' EXIT
}
