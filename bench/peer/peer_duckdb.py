#!/usr/bin/env python3
"""Benchmark peer (DuckDB): the methotrexate monitoring study as one SQL script (peer_duckdb.sql).

The job `sluice link` + `sluice measure` do for policies/studies/mtx-monitoring.toml, as a strong
analyst would write it in DuckDB. Python only reads the key file, hands the script its three
variables, runs it, and writes the JSON document the script's last statement returns. HMAC-SHA256
is computed inside SQL from sha256() over blobs (DuckDB has no HMAC function; no Python UDF).

    peer_duckdb.py --extracts DIR --key FILE --index-date 2024-07-01 --out peer.json
"""

import argparse
import json
import re
import sys
from pathlib import Path

import duckdb


def read_key_hex(path: str) -> str:
    """The hex key of a sluice key file (`key = "<64 hex>"`, format sluice-key-1)."""
    for line in Path(path).read_text().splitlines():
        m = re.fullmatch(r'\s*key\s*=\s*"([0-9a-fA-F]{64})"\s*', line)
        if m:
            return m.group(1).lower()
    sys.exit(f"{path}: no key = \"<64 hex digits>\" line")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--extracts", required=True, help="folder of monthly CSV extracts (quillmere layout)")
    ap.add_argument("--key", required=True, help="sluice key file")
    ap.add_argument("--index-date", default="2024-07-01", help="policy change date YYYY-MM-DD")
    ap.add_argument("--out", required=True, help="JSON file to write")
    ap.add_argument("--threads", type=int, default=None, help="DuckDB threads (default: all cores)")
    a = ap.parse_args()

    if not any(Path(a.extracts).glob("*.csv")):
        sys.exit(f"{a.extracts}: no *.csv extracts")
    con = duckdb.connect()
    if a.threads:
        con.execute(f"SET threads = {int(a.threads)}")
    con.execute("SET VARIABLE extracts_glob = ?", [str(Path(a.extracts) / "*.csv")])
    con.execute("SET VARIABLE key_hex = ?", [read_key_hex(a.key)])
    con.execute("SET VARIABLE index_date = ?", [a.index_date])
    script = (Path(__file__).parent / "peer_duckdb.sql").read_text()
    (answer,) = con.execute(script).fetchone()
    out = json.loads(answer)
    Path(a.out).write_text(json.dumps(out, indent=2) + "\n")


if __name__ == "__main__":
    main()
