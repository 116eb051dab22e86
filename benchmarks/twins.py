"""Benchmark: the cross-source twin refresh over N volunteer and 2N agency records.

Run ``.venv/bin/python benchmarks/twins.py [N ...]`` (default 1e5 1e6). The floor is one
DuckDB pass that reads the same rows and writes the candidate table the refresh starts from
(no pairing); the ratio refresh / floor is what to watch. 5% of the volunteer records are
planted within 1 km and 30 min of an agency record and must all be found. Not part of the
test suite.
"""

from __future__ import annotations

import sys
import time

import duckdb

from harmonize import twins

_SYNTH = """
CREATE TABLE ingests AS SELECT * FROM (VALUES ('vol', 'complete', TIMESTAMP '2024-01-01'),
                                              ('agency', 'complete', TIMESTAMP '2024-01-01'))
    t(ingest_id, status, started_at);
CREATE TABLE agency AS
SELECT 'a' || i AS record_id, 'agency' AS ingest_id, 'survey' AS source_id, 'transect' AS source_kind,
       'agency' AS provider_type, 'seg' || i AS event_id, 'taxon' || (i % 3) AS variable,
       'taxon' AS variable_kind, 'count' AS quantity, 1.0 + i % 7 AS value, false AS zero_filled,
       41.0 + random() * 5 AS lat, -156.0 + random() * 8 AS lon,
       TIMESTAMP '2018-01-01' + to_seconds(CAST(random() * 6 * 365 * 86400 AS BIGINT)) AS event_start,
       NULL::VARCHAR AS observer_id, []::VARCHAR[] AS flags, i AS source_row
FROM range($agency) t(i);
UPDATE agency SET event_end = NULL WHERE false;
"""


def run(n: int) -> tuple[float, float, int, int]:
    con = duckdb.connect()
    con.execute(_SYNTH.replace("$agency", str(2 * n)).replace("UPDATE agency SET event_end = NULL WHERE false;", ""))
    con.execute("ALTER TABLE agency ADD COLUMN event_end TIMESTAMP")
    con.execute("UPDATE agency SET event_end = event_start + INTERVAL 10 MINUTE")
    planted = n // 20
    con.execute(f"""
        CREATE TABLE observations_base AS
        SELECT * FROM agency
        UNION ALL
        SELECT 'v' || i, 'vol', 'volunteers', 'opportunistic', 'volunteer', 'inc' || i, 'taxon' || (i % 3),
               'taxon', 'presence', 1.0, false, 41.0 + random() * 5, -156.0 + random() * 8,
               TIMESTAMP '2018-01-01' + to_seconds(CAST(random() * 6 * 365 * 86400 AS BIGINT)),
               'obs' || (i % 500), [], i, NULL
        FROM range({n - planted}) t(i)
        UNION ALL  -- planted twins: 0.5-1 km and up to 30 min from an agency record of the same taxon
        SELECT 'p' || i, 'vol', 'volunteers', 'opportunistic', 'volunteer', 'pl' || i, a.variable,
               'taxon', 'presence', 1.0, false, a.lat + 0.006, a.lon + 0.004,
               a.event_start + INTERVAL 30 MINUTE, 'obs' || (i % 500), [], i, NULL
        FROM (SELECT *, row_number() OVER () - 1 AS i FROM agency LIMIT {planted}) a""")
    twins.ensure_tables(con)
    con.execute("INSERT INTO twin_settings VALUES ('vol', 'volunteers', 2.0, 60, NULL)")
    t0 = time.perf_counter()
    con.execute("CREATE TEMP TABLE floor AS SELECT record_id, lat, lon, epoch(event_start) t0 FROM observations_base "
                "WHERE variable_kind = 'taxon' AND value > 0")
    floor = time.perf_counter() - t0
    t0 = time.perf_counter()
    found = twins.refresh(con, base="observations_base")
    took = time.perf_counter() - t0
    hit = con.execute("SELECT count(*) FROM twins WHERE record_id LIKE 'p%'").fetchall()[0][0]
    con.close()
    return took, floor, found, hit if hit == planted else -hit


def main(sizes: list[int]) -> None:
    for n in sizes:
        took, floor, found, planted = run(n)
        print(f"{n:>10,} volunteer + {2 * n:,} agency records: refresh {took:.2f} s, floor {floor:.2f} s, "
              f"ratio {took / max(floor, 1e-9):.1f}; {found:,} twins, planted twins found: {planted:,}")


if __name__ == "__main__":
    main([int(float(a)) for a in sys.argv[1:]] or [100_000, 1_000_000])
