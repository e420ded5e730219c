#!/usr/bin/env bash
# Memory under large uploads: COUNT concurrent uploads of one POINTS-point sweep (≈ 29 MB at 270 000
# points) against the release binary on loopback; prints the answers and the server's peak RSS.
#
#   cargo build --release -p henrybook && bash tests/load/big_uploads.sh [COUNT=16] [POINTS=270000]
source "$(dirname "$0")/common.sh"
COUNT=${1:-16}
POINTS=${2:-270000}
token engineer >"$WORK/engineer"; token inspector >"$WORK/inspector"
ENG=$(cat "$WORK/engineer"); INS=$(cat "$WORK/inspector")
start_server --workers 2
curl -sf -o /dev/null -H "authorization: Bearer $ENG" -H 'content-type: application/json' \
    -d '{"part_number":"BIG-1","description":"big uploads","limits":{}}' "$URL/api/v1/parts"
sweeps "$COUNT" "$POINTS"
echo "files: $COUNT sweeps of $POINTS points, $(du -sh "$WORK/sweeps/s0.csv" | cut -f1) each; RSS before: $(( $(rss_kib) / 1024 )) MiB"
for i in $(seq 0 $((COUNT - 1))); do
    curl -s -o /dev/null -w '%{http_code}\n' -H "authorization: Bearer $INS" \
        -F "file=@$WORK/sweeps/s$i.csv" -F part_number=BIG-1 -F lot=L "$URL/api/v1/sweeps" >"$WORK/big.$i" &
done
peak=0
while [ "$(jobs -rp | grep -vc "^$SERVER_PID$")" -gt 0 ]; do
    r=$(rss_kib); [ "$r" -gt "$peak" ] && peak=$r
    echo "$(date +%s.%N | cut -c1-14) rss $((r / 1024)) MiB, answered $(cat "$WORK"/big.* | grep -c .)" >>"$WORK/timeline"
    sleep 0.2
done
echo "answers:"; cat "$WORK"/big.* | sort | uniq -c
echo "peak RSS while uploads were being received (sampled): $(awk '$NF < '"$COUNT"' {gsub("MiB,","",$3); if ($3 > m) m = $3} END {print m+0}' "$WORK/timeline") MiB"
# Then the accepted sweeps are fitted (a fit of this many points holds its Jacobian in memory).
for _ in $(seq 1 600); do
    r=$(rss_kib); [ "$r" -gt "$peak" ] && peak=$r
    q=$(curl -s -H "authorization: Bearer $INS" "$URL/api/v1/queue")
    python3 -c "import json,sys; q=json.loads(sys.argv[1]); sys.exit(0 if q['queued']+q['running']==0 else 1)" "$q" && break
    sleep 0.5
done
echo "fits: $q"
echo "peak RSS with the fits (sampled): $((peak / 1024)) MiB; VmHWM: $(( $(hwm_kib) / 1024 )) MiB; RSS after: $(( $(rss_kib) / 1024 )) MiB"
