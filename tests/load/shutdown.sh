#!/usr/bin/env bash
# Shutdown from outside: a half-sent HTTP request and a half-sent gRPC preface stay open, fits are
# queued and running, then SIGTERM. Reports how long the process took to exit against its drain
# deadline, then restarts on the same database and checks every fit ends succeeded, none twice.
#
#   cargo build --release -p henrybook && bash tests/load/shutdown.sh [DRAIN_S]
source "$(dirname "$0")/common.sh"
DRAIN=${1:-5}
token engineer >"$WORK/engineer"; token inspector >"$WORK/inspector"; token reader >"$WORK/reader"
ENG=$(cat "$WORK/engineer"); INS=$(cat "$WORK/inspector"); RD=$(cat "$WORK/reader")
FLAGS=(--workers 2 --drain-timeout-s "$DRAIN" --shutdown-grace-s "$(python3 -c "print($DRAIN / 2)")")
start_server "${FLAGS[@]}"
curl -sf -o /dev/null -H "authorization: Bearer $ENG" -H 'content-type: application/json' \
    -d '{"part_number":"SD-1","description":"shutdown","limits":{}}' "$URL/api/v1/parts"
sweeps 40 1601
# Rational fits at a high order keep the workers busy for a while.
for i in $(seq 0 39); do
    curl -s -o /dev/null -H "authorization: Bearer $INS" -F "file=@$WORK/sweeps/s$i.csv" \
        -F part_number=SD-1 -F lot=L -F 'options={"family":"rational","rational_order":60,"rational_max_relocations":1000,"time_limit_s":60}' \
        "$URL/api/v1/sweeps"
done
sleep 1
exec 3<>"/dev/tcp/127.0.0.1/$PORT"; printf 'POST /api/v1/sweeps HTTP/1.1\r\nhost: x\r\ncontent-le' >&3
exec 4<>"/dev/tcp/127.0.0.1/$GRPC_PORT"; printf 'PRI * HTTP/2.0\r\n' >&4
queue=$(curl -s -H "authorization: Bearer $RD" "$URL/api/v1/queue")
echo "before SIGTERM: $queue; a half-sent HTTP request and gRPC preface open; drain deadline ${DRAIN}s"
t0=$(date +%s.%N)
kill -TERM "$SERVER_PID"
wait "$SERVER_PID" || true
python3 -c "import time; print(f'exited {time.time() - $t0:.2f} s after SIGTERM (deadline $DRAIN s)')"
exec 3>&- 4>&-
echo "jobs in the database after exit: $(sqlite3 "$DB" "SELECT state || ' ' || COUNT(*) FROM jobs GROUP BY state" | tr '\n' ';')"
start_server --workers 2
t0=$(date +%s)
while :; do
    q=$(curl -s -H "authorization: Bearer $RD" "$URL/api/v1/queue")
    python3 -c "import json,sys; q=json.loads(sys.argv[1]); sys.exit(0 if q['queued']+q['running']==0 else 1)" "$q" && break
    [ $(( $(date +%s) - t0 )) -lt 600 ] || { echo "not done in 600 s: $q"; break; }
    sleep 2
done
echo "after the restart: $q"
echo "fits succeeded more than once: $(sqlite3 "$DB" "SELECT COUNT(*) FROM (SELECT fit_id FROM audit WHERE action='fit-succeeded' GROUP BY fit_id HAVING COUNT(*) > 1)")"
echo "integrity: $(sqlite3 "$DB" 'PRAGMA integrity_check')"
