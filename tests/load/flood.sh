#!/usr/bin/env bash
# Upload flood against the release binary on loopback (bounded: at most DURATION seconds, N files).
# Reports uploads accepted and refused (429/503, with or without Retry-After), any other answer, the
# server's peak RSS, and fits completed per second during the flood and after it.
#
#   cargo build --release -p henrybook && bash tests/load/flood.sh [DURATION_S] [CONCURRENCY] [POINTS]
#
# Extra server flags can be given in HENRYBOOK_FLOOD_FLAGS (e.g. "--max-queued-fits 200").
source "$(dirname "$0")/common.sh"
DURATION=${1:-30}
CONCURRENCY=${2:-16}
POINTS=${3:-1601}
N=400
[ "$DURATION" -le 300 ] || { echo "at most 300 s" >&2; exit 1; }

token engineer >"$WORK/engineer"
token inspector >"$WORK/inspector"
token reader >"$WORK/reader"
# shellcheck disable=SC2086
start_server --workers 2 ${HENRYBOOK_FLOOD_FLAGS:-}
ENG=$(cat "$WORK/engineer"); INS=$(cat "$WORK/inspector"); RD=$(cat "$WORK/reader")
PARTS=8
for p in $(seq -f 'FL-%g' 1 $PARTS); do
    curl -sf -o /dev/null -H "authorization: Bearer $ENG" -H 'content-type: application/json' \
        -d "{\"part_number\":\"$p\",\"description\":\"flood\",\"limits\":{}}" "$URL/api/v1/parts"
done
sweeps $N "$POINTS"
echo "files: $N synthetic sweeps of $POINTS points, $(du -sh "$WORK/sweeps" | cut -f1); $CONCURRENCY uploaders for ${DURATION}s"

succeeded() { curl -s -H "authorization: Bearer $RD" "$URL/api/v1/queue" | python3 -c 'import json,sys; q=json.load(sys.stdin); print(q["succeeded"], q["queued"], q["running"])'; }

# The uploaders: one Python process, CONCURRENCY threads on keep-alive connections (forking a curl per
# upload took more CPU than the server did). One line per answer: status and Retry-After (or -).
uploaders() {
    python3 - "$PORT" "$INS" "$WORK/sweeps" "$N" "$PARTS" "$CONCURRENCY" "$DURATION" >"$WORK/answers" <<'PY'
import http.client, sys, threading, time
port, token, folder, n, parts, conc, duration = sys.argv[1], sys.argv[2], sys.argv[3], *map(int, sys.argv[4:])
files = [open(f"{folder}/s{i}.csv", "rb").read() for i in range(n)]
end = time.time() + duration
out, lock = [], threading.Lock()
def body(i):
    # Every (file, part) pair once before any repeats: a repeat is answered as a duplicate.
    b = b"zzflood"
    fields = [("part_number", f"FL-{(i // n) % parts + 1}"), ("lot", f"L{i}")]
    parts_ = [f'--{b.decode()}\r\ncontent-disposition: form-data; name="{k}"\r\n\r\n{v}\r\n'.encode() for k, v in fields]
    parts_.append(f'--{b.decode()}\r\ncontent-disposition: form-data; name="file"; filename="s{i % n}.csv"\r\ncontent-type: text/csv\r\n\r\n'.encode() + files[i % n] + b"\r\n")
    parts_.append(f"--{b.decode()}--\r\n".encode())
    return b"".join(parts_), f"multipart/form-data; boundary={b.decode()}"
def run(k):
    c, i, mine = http.client.HTTPConnection("127.0.0.1", int(port), timeout=60), k, []
    while time.time() < end:
        data, ctype = body(i)
        try:
            c.request("POST", "/api/v1/sweeps", data, {"authorization": f"Bearer {token}", "content-type": ctype})
            r = c.getresponse(); r.read()
            mine.append(f"{r.status} {r.getheader('retry-after') or '-'}")
        except Exception as e:
            mine.append(f"error {type(e).__name__}")
            c.close(); c = http.client.HTTPConnection("127.0.0.1", int(port), timeout=60)
        i += conc
    with lock: out.extend(mine)
threads = [threading.Thread(target=run, args=(k,)) for k in range(conc)]
for t in threads: t.start()
for t in threads: t.join()
print("\n".join(out))
PY
}

cpu_s() { awk '{print ($14 + $15) / 100}' "/proc/$SERVER_PID/stat"; }
engine_s() { curl -s "$URL/metrics" | awk '/^henrybook_fit_duration_seconds_sum/ {s=$2} /^henrybook_fit_duration_seconds_count/ {c=$2} END {print s+0, c+0}'; }
read -r done0 _ _ < <(succeeded)
cpu0=$(cpu_s); read -r es0 ec0 < <(engine_s)
start=$(date +%s.%N)
end=$(( $(date +%s) + DURATION ))
uploaders &
UPLOADERS=$!
peak=0
while [ "$(date +%s)" -lt "$end" ]; do
    r=$(rss_kib); [ "$r" -gt "$peak" ] && peak=$r
    sleep 0.5
done
wait "$UPLOADERS"
read -r done1 queued running < <(succeeded)
cpu1=$(cpu_s); read -r es1 ec1 < <(engine_s)
elapsed=$(python3 -c "import time; print(time.time() - $start)")
echo "answers ($(grep -c . "$WORK/answers") uploads; a 202 may be a duplicate of an earlier upload):"; awk '{print $1, ($1=="error" ? $2 : ($2=="-" ? "no Retry-After" : "Retry-After " $2))}' "$WORK/answers" | sort | uniq -c
fivexx_without=$(awk '$1 ~ /^5/ && $2 == "-"' "$WORK/answers" | wc -l)
echo "5xx without Retry-After: $fivexx_without"
python3 -c "print(f'fits completed during the flood: {$done1 - $done0} in {$elapsed:.1f} s = {($done1 - $done0) / $elapsed:.1f} fits/s; queue at the end: $queued queued, $running running')"
python3 -c "print(f'server CPU during the flood: {$cpu1 - $cpu0:.1f} s of {$elapsed:.1f} s wall; engine time per fit: {($es1 - $es0) / max($ec1 - $ec0, 1) * 1000:.0f} ms')"
echo "peak RSS during the flood (sampled): $((peak / 1024)) MiB; VmHWM: $(( $(hwm_kib) / 1024 )) MiB"
# After the flood: the queue drains.
t0=$(date +%s.%N)
while :; do
    read -r d q r < <(succeeded)
    [ "$q" -eq 0 ] && [ "$r" -eq 0 ] && break
    sleep 1
    [ "$(python3 -c "import time; print(int(time.time() - $t0))")" -lt 300 ] || { echo "queue not drained in 300 s"; break; }
done
t=$(python3 -c "import time; print(time.time() - $t0)")
read -r es2 ec2 < <(engine_s)
python3 -c "print(f'engine time per fit after the flood: {($es2 - $es1) / max($ec2 - $ec1, 1) * 1000:.0f} ms')"
python3 -c "print(f'queue drained {$t:.1f} s after the flood ({$d - $done1} more fits)')"
echo "RSS after the drain: $(( $(rss_kib) / 1024 )) MiB"
