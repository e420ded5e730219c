# Shared by flood.sh and shutdown.sh: start the release binary on loopback with its own database,
# make tokens and a part, write synthetic sweeps. Loopback only; everything lives in $WORK.
set -euo pipefail
ROOT=$(cd "$(dirname "$0")/../.." && pwd)
BIN=${HENRYBOOK_BIN:-$ROOT/target/release/henrybook}
[ -x "$BIN" ] || { echo "build it first: cargo build --release -p henrybook" >&2; exit 1; }
WORK=$(mktemp -d)
DB=$WORK/henrybook.db
free_port() { python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1])'; }
PORT=$(free_port)
GRPC_PORT=$(free_port)
URL=http://127.0.0.1:$PORT
SERVER_PID=

token() { "$BIN" token create --role "$1" --database "$DB" 2>/dev/null; }

# start_server [extra flags...]: serves in the background, waits for /healthz.
start_server() {
    "$BIN" serve --database "$DB" --listen 127.0.0.1:$PORT --grpc-listen 127.0.0.1:$GRPC_PORT "$@" \
        >"$WORK/server.log" 2>&1 &
    SERVER_PID=$!
    for _ in $(seq 1 100); do
        curl -sf "$URL/healthz" >/dev/null 2>&1 && return 0
        sleep 0.1
    done
    echo "the server did not start; its log:" >&2; cat "$WORK/server.log" >&2; exit 1
}

rss_kib() { awk '/^VmRSS/ {print $2}' "/proc/$SERVER_PID/status" 2>/dev/null || echo 0; }
hwm_kib() { awk '/^VmHWM/ {print $2}' "/proc/$SERVER_PID/status" 2>/dev/null || echo 0; }

cleanup() {
    if [ -n "$SERVER_PID" ] && kill -0 "$SERVER_PID" 2>/dev/null; then
        { kill -KILL "$SERVER_PID"; wait "$SERVER_PID"; } 2>/dev/null || true
    fi
    rm -rf "$WORK"
}
trap cleanup EXIT

# sweeps N POINTS: N synthetic impedance CSVs of invented series L-R parallel C parts (all different).
sweeps() {
    python3 - "$WORK/sweeps" "$1" "$2" <<'PY'
import cmath, math, os, sys
out, n, points = sys.argv[1], int(sys.argv[2]), int(sys.argv[3])
os.makedirs(out, exist_ok=True)
for i in range(n):
    l, r, c = 1e-5 * (1 + i / 997), 0.05, 5e-12
    rows = ["frequency_hz,z_real_ohm,z_imag_ohm,sigma_ohm"]
    for k in range(points):
        f = 1e4 * (1e8 / 1e4) ** (k / (points - 1))
        s = 2j * math.pi * f
        z = 1 / (1 / (r + s * l) + s * c)
        rows.append(f"{f:.9e},{z.real:.12e},{z.imag:.12e},{2e-3 * abs(z):.6e}")
    open(os.path.join(out, f"s{i}.csv"), "w").write("\n".join(rows) + "\n")
PY
}
