#!/usr/bin/env bash
# Crash safety from outside: N fits queued, the server killed with SIGKILL K times at random moments
# while they run and restarted each time; then every fit must have succeeded exactly once (one
# `fit-succeeded` audit row each), none left queued or running, SQLite's integrity check ok, and
# `henrybook verify` (audit hash chain, recorded results, stored verdicts) clean.
#
#   cargo build --release -p henrybook && bash tests/load/crash.sh [FITS=1000] [KILLS=5]
source "$(dirname "$0")/common.sh"
N=${1:-1000}
KILLS=${2:-5}
[ "$N" -le 5000 ] || { echo "at most 5000 fits" >&2; exit 1; }
token engineer >"$WORK/engineer"; token inspector >"$WORK/inspector"; token reader >"$WORK/reader"
ENG=$(cat "$WORK/engineer"); INS=$(cat "$WORK/inspector"); RD=$(cat "$WORK/reader")
FLAGS=(--workers 2 --max-queued-fits "$N" --max-queued-fits-per-part "$N")
start_server "${FLAGS[@]}"
curl -sf -o /dev/null -H "authorization: Bearer $ENG" -H 'content-type: application/json' \
    -d '{"part_number":"CR-1","description":"crash","limits":{"dcr_max_ohm":1}}' "$URL/api/v1/parts"
sweeps "$N" 1601
# Eight uploads at a time, so the queue is still long when the kills come.
export INS URL WORK
seq 0 $((N - 1)) | xargs -P 8 -I{} sh -c 'curl -s -o /dev/null -w "%{http_code}\n" \
    -H "authorization: Bearer $INS" -F "file=@$WORK/sweeps/s{}.csv" -F part_number=CR-1 \
    -F "lot=L{}" "$URL/api/v1/sweeps"' >"$WORK/codes"
accepted=$(grep -c '^202$' "$WORK/codes" || true)
echo "uploaded $accepted of $N"
queue() { curl -s -H "authorization: Bearer $RD" "$URL/api/v1/queue"; }
busy() { python3 -c "import json,sys; q=json.loads(sys.argv[1]); print(q['queued']+q['running'])" "$(queue)"; }
for k in $(seq 1 "$KILLS"); do
    sleep "$(python3 -c 'import random; print(round(random.uniform(0.3, 2.5), 2))')"
    echo "kill -9 #$k with $(busy) fits to go"
    kill -KILL "$SERVER_PID"; wait "$SERVER_PID" 2>/dev/null || true
    start_server "${FLAGS[@]}"
done
t0=$(date +%s)
while [ "$(busy)" != 0 ]; do
    [ $(( $(date +%s) - t0 )) -lt 900 ] || { echo "not done in 900 s: $(queue)"; break; }
    sleep 1
done
echo "queue at the end: $(queue)"
kill -TERM "$SERVER_PID"; wait "$SERVER_PID" 2>/dev/null || true
SERVER_PID=
succeeded=$(sqlite3 "$DB" "SELECT COUNT(*) FROM fits WHERE status = 'succeeded'")
twice=$(sqlite3 "$DB" "SELECT COUNT(*) FROM (SELECT fit_id FROM audit WHERE action = 'fit-succeeded' GROUP BY fit_id HAVING COUNT(*) > 1)")
once=$(sqlite3 "$DB" "SELECT COUNT(DISTINCT fit_id) FROM audit WHERE action = 'fit-succeeded'")
left=$(sqlite3 "$DB" "SELECT COUNT(*) FROM jobs WHERE state <> 'done'")
echo "fits succeeded: $succeeded of $accepted; with one fit-succeeded row: $once; more than one: $twice; jobs not done: $left"
echo "integrity: $(sqlite3 "$DB" 'PRAGMA integrity_check')"
"$BIN" verify --database "$DB" 2>&1 | tail -3
[ "$succeeded" = "$accepted" ] && [ "$once" = "$accepted" ] && [ "$twice" = 0 ] && [ "$left" = 0 ]
