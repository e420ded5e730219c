"""Counts the SQL statements in a server log written with RUST_LOG=sqlx::query=debug (text format).

    HENRYBOOK_LOAD_SERVER_LOG=/tmp/server.log HENRYBOOK_LOAD_RUST_LOG=sqlx::query=debug \
    HENRYBOOK_LOAD_FITS_ONLY=1 cargo run --release -p henrybook-tests --example load -- 100
    python3 tests/load/statements.py /tmp/server.log 100

Prints each distinct statement (whitespace folded, numbers in it kept) with how many times it ran
and how many times per fit, largest first, then the total per fit. Transactions begun and committed
through sqlx's own calls (BEGIN, COMMIT) and pool pings are not logged by sqlx and are not counted.
"""

import collections
import re
import sys


def main() -> None:
    path, fits = sys.argv[1], int(sys.argv[2])
    counts: collections.Counter[str] = collections.Counter()
    pattern = re.compile(r'summary="((?:[^"\\]|\\.)*)" db\.statement="((?:[^"\\]|\\.)*)"')
    colour = re.compile(r"\x1b\[[0-9;]*m")
    for line in open(path, encoding="utf-8", errors="replace"):
        line = colour.sub("", line)
        if "sqlx::query" not in line:
            continue
        m = pattern.search(line)
        if not m:
            continue
        summary, statement = m.group(1), m.group(2)
        text = statement.replace("\\n", " ") if statement else summary
        counts[" ".join(text.split())[:150]] += 1
    total = sum(counts.values())
    for text, n in counts.most_common():
        print(f"{n:7d} {n / fits:6.2f}/fit  {text}")
    print(f"{total:7d} {total / fits:6.2f}/fit  in all")


if __name__ == "__main__":
    main()
