#!/usr/bin/env bash
# Runs the fuzz targets (cargo-fuzz + libFuzzer, on stable with `-s none`), installing cargo-fuzz when
# it is missing. The seed corpora are made here, at run time, from demo-data/ and, when present,
# ../shared/real-sweeps/ (the real sweeps are never copied into the repository: fuzz/corpus/ is
# ignored by git), plus a few small invented files that reach the Touchstone 2 keywords.
#
#   bash fuzz/run.sh --seconds 30             each target for 30 s
#   bash fuzz/run.sh --runs 4000000 csv       exactly 4 000 000 inputs of the csv target
#   bash fuzz/run.sh --dev --seconds 20       unoptimised build (what .ci/run does): about half the
#                                             build time of the default optimised one, about a
#                                             tenth of its inputs per second
#
# A hang is an input that takes more than 1 s (-timeout=1; for the fit target 10 s, or 60 s with
# --dev); a crash, abort, hang or an input over
# 2 GB of memory stops the run with a non-zero exit code and leaves the input in fuzz/artifacts/.
# Each run ends with libFuzzer's "Done N runs in S second(s)" line, the input count to report.
set -euo pipefail
cd "$(dirname "$0")"

limit=(-max_total_time=30)
build=()
targets=()
while [ $# -gt 0 ]; do
  case "$1" in
    --seconds) limit=(-max_total_time="$2"); shift 2 ;;
    --runs) limit=(-runs="$2"); shift 2 ;;
    --dev) build=(-D); shift ;;
    -*) echo "unknown option $1" >&2; exit 2 ;;
    *) targets+=("$1"); shift ;;
  esac
done
[ ${#targets[@]} -gt 0 ] || targets=(touchstone csv upload_fields fit)

if ! command -v cargo-fuzz >/dev/null; then
  cargo install cargo-fuzz --locked
fi

demo=../demo-data
real=../../shared/real-sweeps

# seed DIR NAME SELECTOR-BYTE-IN-OCTAL: stdin, behind the selector byte the target reads first.
seed() {
  mkdir -p "corpus/$1"
  { printf "\\$3"; cat; } > "corpus/$1/$2"
}

# Touchstone: selector bits 0-1 pick the name (s1p, s2p, ts), bits 2-4 the method (0 none,
# 1 reflection, 2 series-thru, 3 shunt-thru). Long files are cut to their first 60 lines: the
# structure is at the top, and short inputs keep the executions fast.
for f in "$demo"/*/*.s1p "$demo"/*/*.ts "$demo"/*/*.s2p; do
  case "$f" in
    *.s1p) sel=000 ;;
    *.ts) sel=002 ;;
    *series-thru*) sel=011 ;;
    *) sel=015 ;;
  esac
  head -n 60 "$f" | seed touchstone "demo-$(basename "$f")" $sel
done
if [ -d "$real" ]; then
  for f in "$real"/*.s1p; do
    head -n 60 "$f" | seed touchstone "real-$(basename "$f")" 000
  done
  # The segment boundary that repeats a frequency (the file's lines 900-920).
  if [ -f "$real/unknown-torroid-9x5x3.44.s1p" ]; then
    { head -n 1 "$real/unknown-torroid-9x5x3.44.s1p"; sed -n 900,920p "$real/unknown-torroid-9x5x3.44.s1p"; } |
      seed touchstone real-boundary.s1p 000
  fi
else
  echo "note: $real is absent; seeding from demo-data/ only" >&2
fi
printf '# Hz S RI R 50\n0 -0.99 0\n1000 -0.98 0.01\n1000 -0.98 0.02\n2000 -0.97 0.03\n' |
  seed touchstone dc-and-repeat.s1p 000
printf '[Version] 2.0\n# Hz Z RI\n[Number of Ports] 2\n[Two-Port Data Order] 21_12\n[Number of Frequencies] 2\n[Matrix Format] Lower\n[Reference] 50\n 50\n[Begin Information]\nx\n[End Information]\n[Network Data]\n1 1 0 2 0 3 0\n2 1 0\n 2 0 3 0\n[End]\n' |
  seed touchstone v2-lower.ts 016
printf '[Version] 2.0\n# GHz S MA\n[Number of Ports] 2\n[Two-Port Data Order] 12_21\n[Number of Frequencies] 1\n[Number of Noise Frequencies] 1\n[Network Data]\n1 1 0 0.1 0 0.1 0 1 0\n[Noise Data]\n1 2.0 0.5 30 0.3\n[End]\n' |
  seed touchstone v2-noise.ts 012

# CSV: selector bits 0-4 pick the method, bit 5 hides the .csv name, bit 6 zeroes the relative floor.
for f in "$demo"/*/*.csv; do
  head -n 60 "$f" | seed csv "demo-$(basename "$f")" 000
  head -n 60 "$f" | seed csv "named-by-content-$(basename "$f")" 040
done
printf 'frequency_hz;z_mag_ohm;z_phase_deg;sigma_ohm\n0;0.1;0;0.001\n10;3;80;0.01\n10;3.1;80;0.01\n20;6;85;0.01\n' |
  seed csv dc-and-repeat.csv 100

# Fit: the same CSV files, read as they are named; selector bits 0-3 pick the method, bit 4 the
# rational family instead of the lumped one.
for f in "$demo"/*/*.csv; do
  head -n 60 "$f" | seed fit "lumped-$(basename "$f")" 000
  head -n 60 "$f" | seed fit "rational-$(basename "$f")" 020
done

# Upload fields: bits 0-1 say which fixture files came; NUL-separated fields in form order.
python3 - "$demo/manifest.json" <<'PY'
import json, os, sys
m = json.load(open(sys.argv[1]))
os.makedirs("corpus/upload_fields", exist_ok=True)
k = 0
for p in m["parts"]:
    for s in p["sweeps"]:
        num = lambda v: "" if v is None else repr(v)
        fields = ["", p["part_number"], s["lot"], s["method"], num(s["z0_ohm"]), num(s["dcr_ohm"]),
                  num(s["temperature_c"]), s["operator"], json.dumps({"report_frequencies_hz": [1e6]})]
        open(f"corpus/upload_fields/demo-{k}", "wb").write(b"\x00" + "\0".join(fields).encode())
        k += 1
fields = ["two-port", "PN-1", "L1", "series-thru", "50", "null", "-40", "",
          json.dumps({"family": "rational", "dcr": {"value_ohm": 0.1, "sigma_ohm": 0.001},
                      "rational_fallback_above_rms_weighted": None})]
open("corpus/upload_fields/fixture", "wb").write(b"\x03" + "\0".join(fields).encode())
PY

for t in "${targets[@]}"; do
  echo "== fuzz target $t: ${limit[*]}"
  # The fit target runs the whole engine with a 2 s time limit, which a fit checks between its
  # candidate models: its hang limit is 10 s optimised, 60 s in the unoptimised --dev build (about
  # ten times slower, so that a CI run does not fail on a slow but bounded fit). The readers' is 1 s.
  timeout=1
  dict="dict/$t.dict"
  if [ "$t" = fit ]; then
    dict=dict/csv.dict
    if [ ${#build[@]} -gt 0 ]; then timeout=60; else timeout=10; fi
  fi
  cargo fuzz run -s none "${build[@]}" "$t" "corpus/$t" -- \
    "${limit[@]}" -timeout=$timeout -rss_limit_mb=2048 -max_len=8192 -dict="$dict" \
    -print_final_stats=1
done
