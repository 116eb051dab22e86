"""Hostile inputs through the real command: each is refused with exit 2 and one line.

Archives with path-traversal members, XML entity bombs in meta.xml, zip bombs, a CSV with
a 1 GB single line, profiles and study paths escaping the study folder, and names built to
break SQL. Nothing is written outside the study and the store stays sound. Threats as
listed by the Python documentation ("zipfile: Decompression pitfalls"; "XML
vulnerabilities" table of the xml package docs) and OWASP (SQL injection prevention cheat
sheet: bind values, quote identifiers).
"""

from __future__ import annotations

import csv
import io
import json
import os
import shutil
import struct
import subprocess
import sys
import textwrap
import zipfile
from pathlib import Path

import duckdb
import pytest
from cli_runner import cli

from harmonize.store import Store
from harmonize.study import load_study

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
DWCA = FIXTURES / "opportunistic" / "dwca_checklists"
META_OK = (DWCA / "meta.xml").read_text()


def assert_refused(result: tuple[int, str, str], *needles: str) -> str:
    """Exit 2 with exactly one line on stderr holding every needle; returns the line."""
    code, _, err = result
    lines = err.strip().splitlines()
    assert code == 2, err
    assert len(lines) == 1, err
    assert lines[0].startswith("error: "), err
    for needle in needles:
        assert needle in lines[0], lines[0]
    return lines[0]


def _zip(path: Path, members: dict[str, str | bytes], compression: int = zipfile.ZIP_DEFLATED) -> Path:
    with zipfile.ZipFile(path, "w", compression) as zf:
        for name, data in members.items():
            zf.writestr(zipfile.ZipInfo(name) if name.endswith("/") else name, data)
    return path


def _good_members() -> dict[str, str | bytes]:
    return {"meta.xml": META_OK, "event.txt": (DWCA / "event.txt").read_bytes(),
            "occurrence.txt": (DWCA / "occurrence.txt").read_bytes()}


def _files_under(root: Path) -> set[str]:
    return {p.relative_to(root).as_posix() for p in root.rglob("*")}


# ------------------------------------------------------------------------------ archives
def test_a_sound_archive_is_ingested(study_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # the control case: the refusals below are about the hostile part, not the archive
    archive = _zip(study_dir / "portal.zip", _good_members())
    code, out, err = cli(capsys, "--study", str(study_dir), "ingest", "opportunistic_dwc", str(archive))
    assert code == 0, err
    assert "ingested" in out


@pytest.mark.parametrize("name", [
    "../evil.txt", "../../../../../../tmp/evil.txt", "/tmp/evil.txt", "data/../../evil.txt",
    "C:\\evil.txt", "..\\..\\evil.txt", "./../evil.txt",
])
def test_archive_with_a_path_traversal_member_is_refused(
    study_dir: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str], name: str
) -> None:
    archive = _zip(study_dir / "portal.zip", {**_good_members(), name: "owned"})
    before = _files_under(tmp_path)
    result = cli(capsys, "--study", str(study_dir), "ingest", "opportunistic_dwc", str(archive))
    assert_refused(result, "portal.zip", "refused (path traversal)")
    assert _files_under(tmp_path) == before  # nothing extracted, no store created
    assert not Path("/tmp/evil.txt").exists() or Path("/tmp/evil.txt").read_text() != "owned"


BILLION_LAUGHS = """<?xml version="1.0"?>
<!DOCTYPE lolz [<!ENTITY lol "lol"><!ENTITY lol1 "&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;">
<!ENTITY lol2 "&lol1;&lol1;&lol1;&lol1;&lol1;&lol1;&lol1;&lol1;&lol1;&lol1;">
<!ENTITY lol3 "&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;">
<!ENTITY lol4 "&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;">
<!ENTITY lol5 "&lol4;&lol4;&lol4;&lol4;&lol4;&lol4;&lol4;&lol4;&lol4;&lol4;">
<!ENTITY lol6 "&lol5;&lol5;&lol5;&lol5;&lol5;&lol5;&lol5;&lol5;&lol5;&lol5;">
<!ENTITY lol7 "&lol6;&lol6;&lol6;&lol6;&lol6;&lol6;&lol6;&lol6;&lol6;&lol6;">
<!ENTITY lol8 "&lol7;&lol7;&lol7;&lol7;&lol7;&lol7;&lol7;&lol7;&lol7;&lol7;">
<!ENTITY lol9 "&lol8;&lol8;&lol8;&lol8;&lol8;&lol8;&lol8;&lol8;&lol8;&lol8;">]>
<archive xmlns="http://rs.tdwg.org/dwc/text/"><core rowType="&lol9;"/></archive>"""
# quadratic blow-up: one large entity referenced many times (no nesting)
QUADRATIC = ('<?xml version="1.0"?><!DOCTYPE a [<!ENTITY big "' + "x" * 50_000 + '">]>'
             '<archive xmlns="http://rs.tdwg.org/dwc/text/"><core rowType="' + "&big;" * 50_000 + '"/></archive>')
EXTERNAL_FILE = """<?xml version="1.0"?>
<!DOCTYPE archive [<!ENTITY ext SYSTEM "file:///etc/passwd">]>
<archive xmlns="http://rs.tdwg.org/dwc/text/"><core rowType="&ext;"/></archive>"""
EXTERNAL_DTD = """<?xml version="1.0"?>
<!DOCTYPE archive SYSTEM "http://127.0.0.1:9/evil.dtd">
<archive xmlns="http://rs.tdwg.org/dwc/text/"><core rowType="x"/></archive>"""


@pytest.mark.parametrize("meta", [BILLION_LAUGHS, QUADRATIC, EXTERNAL_FILE, EXTERNAL_DTD],
                         ids=["billion_laughs", "quadratic", "external_entity", "external_dtd"])
def test_xml_entity_bomb_in_meta_xml_is_refused(study_dir: Path, capsys: pytest.CaptureFixture[str], meta: str) -> None:
    archive = _zip(study_dir / "portal.zip", {**_good_members(), "meta.xml": meta})
    result = cli(capsys, "--study", str(study_dir), "ingest", "opportunistic_dwc", str(archive))
    assert_refused(result, "portal.zip", "meta.xml", "refused")
    assert not (study_dir / "store").exists()


def test_zip_bomb_is_refused_before_it_is_inflated(study_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # 256 MiB of one byte deflate to about 250 KB (ratio about 1000:1)
    members = _good_members()
    members["occurrence.txt"] = b"\t" * (256 << 20)
    archive = _zip(study_dir / "portal.zip", members)
    assert archive.stat().st_size < 2 << 20
    result = cli(capsys, "--study", str(study_dir), "ingest", "opportunistic_dwc", str(archive))
    assert_refused(result, "portal.zip", "possible decompression bomb")


def _lie_about_size(archive: Path, member: str, declared: int) -> None:
    """Rewrite the uncompressed size of ``member`` in its local and central headers."""
    data = bytearray(archive.read_bytes())
    name = member.encode()
    for sig, size_at, name_len_at, header_len in ((b"PK\x03\x04", 22, 26, 30), (b"PK\x01\x02", 24, 28, 46)):
        pos = data.find(sig)
        while pos >= 0:
            n = struct.unpack_from("<H", data, pos + name_len_at)[0]
            if bytes(data[pos + header_len:pos + header_len + n]) == name:
                struct.pack_into("<I", data, pos + size_at, declared)
            pos = data.find(sig, pos + 4)
    archive.write_bytes(bytes(data))


def test_member_that_lies_about_its_size_is_refused(study_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # declared 100 bytes, inflates to 8 MiB: the reader stops at the declared size and the
    # checksum no longer matches
    members = _good_members()
    members["occurrence.txt"] = members["occurrence.txt"] + b"\n" * (8 << 20)
    archive = _zip(study_dir / "portal.zip", members)
    _lie_about_size(archive, "occurrence.txt", 100)
    result = cli(capsys, "--study", str(study_dir), "ingest", "opportunistic_dwc", str(archive))
    assert_refused(result, "portal.zip", "occurrence.txt")


# ------------------------------------------------------------------------------ text files
_PEAK_PROBE = textwrap.dedent("""
    import resource, sys
    from harmonize.cli.app import main
    try:
        main()
    except SystemExit as exc:
        code = exc.code
    print(f"maxrss_kb={resource.getrusage(resource.RUSAGE_SELF).ru_maxrss}", file=sys.stderr)
    sys.exit(code)
""")


def _check_with_peak(study_dir: Path, events: Path) -> tuple[subprocess.CompletedProcess[str], float]:
    """``harmonize check`` in a fresh interpreter: the result and its peak memory (MB)."""
    out = subprocess.run(
        [sys.executable, "-c", _PEAK_PROBE, "--study", str(study_dir), "check", "trawl_agency",
         "--events", str(events), "--records", str(study_dir / "catch_messy.csv")],
        capture_output=True, text=True, timeout=600, env={**os.environ, "COLUMNS": "200"},
    )
    return out, int(out.stderr.strip().splitlines()[-1].split("=")[1]) / 1024


@pytest.mark.subprocess
def test_one_gigabyte_single_line_csv_is_refused_in_bounded_memory(study_dir: Path) -> None:
    # A real 1 GiB file (beyond its first 32 MiB of text the file system stores it sparse);
    # the refusal must come from a streaming guard, not from reading the line into memory.
    _, baseline_mb = _check_with_peak(study_dir, study_dir / "hauls_messy.csv")
    big = study_dir / "endless.csv"
    with open(big, "wb") as fh:
        fh.write(b"HAUL_NO,START,END,LAT_S,LON_S,LAT_E,LON_E,SPEED_KN,WING_M,DEPTH_FM,BOT_TEMP\nH001,")
        fh.write(b"x" * (32 << 20))
        fh.seek((1 << 30) - 10, os.SEEK_CUR)
        fh.write(b",,,,,,,,,\n")
    try:
        assert big.stat().st_size > 1 << 30
        out, peak_mb = _check_with_peak(study_dir, big)
    finally:
        big.unlink()
    lines = out.stderr.strip().splitlines()
    assert out.returncode == 2, out.stderr
    assert lines[0].startswith("error: ") and "endless.csv: line 2 is longer than 16 MiB" in lines[0]
    # the same command on the small file is the baseline (the interpreter with pandas, DuckDB
    # and Arrow loaded); reading the line would add at least 1 GB
    assert peak_mb < baseline_mb + 200, f"peak {peak_mb:.0f} MB against {baseline_mb:.0f} MB: the file was read"


def test_unclosed_quote_swallowing_the_file_is_refused(study_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    hauls = (study_dir / "hauls_messy.csv").read_text().splitlines(keepends=True)
    filler = "".join(f"H9{i:05d},2020-06-10T08:00:00,2020-06-10T08:30:00,43,-153,43.02,-153,,20,50,\n"
                     for i in range(20_000))  # about 1.5 MB after the stray quote: one endless field
    (study_dir / "hauls_messy.csv").write_text(hauls[0] + '"' + hauls[1] + filler)
    result = cli(capsys, "--study", str(study_dir), "check", "trawl_agency",
                 "--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv"))
    assert_refused(result, "hauls_messy.csv", "check quoting")


@pytest.mark.parametrize("content", [
    b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR" + bytes(range(256)) * 4,  # an image
    b"\x1f\x8b\x08\x00" + bytes(range(256)) * 4,  # a gzip stream
    "HAUL_NO,START\nH1,2020".encode("utf-16-le"),  # UTF-16 without a byte-order mark
], ids=["png", "gzip", "utf16"])
def test_binary_file_given_as_csv_is_refused(study_dir: Path, capsys: pytest.CaptureFixture[str], content: bytes) -> None:
    (study_dir / "hauls_messy.csv").write_bytes(content)
    result = cli(capsys, "--study", str(study_dir), "ingest", "trawl_agency",
                 "--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv"))
    assert_refused(result, "hauls_messy.csv")
    assert not (study_dir / "store").exists()


# ------------------------------------------------------------------------------ paths
def test_profile_outside_the_study_folder_is_refused(study_dir: Path, tmp_path: Path,
                                                     capsys: pytest.CaptureFixture[str]) -> None:
    outside = tmp_path / "elsewhere.toml"
    shutil.copy(study_dir / "profiles" / "trawl_agency.toml", outside)
    files = ["--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv")]
    for given in (str(outside), "../elsewhere.toml", "profiles/../../elsewhere.toml"):
        result = cli(capsys, "--study", str(study_dir), "ingest", given, *files)
        assert_refused(result, "elsewhere.toml", "outside the study folder")
    # a link inside profiles/ that points outside is refused too
    (study_dir / "profiles" / "linked.toml").symlink_to(outside)
    result = cli(capsys, "--study", str(study_dir), "ingest", "linked", *files)
    assert_refused(result, "elsewhere.toml", "outside the study folder")
    assert not (study_dir / "store").exists()


@pytest.mark.parametrize(("key", "value"), [
    ("domain", "../../../etc/hosts"), ("strata", "/etc/hosts"), ("domain", "profiles/../../x.geojson"),
])
def test_study_paths_outside_the_study_folder_are_refused(study_dir: Path, capsys: pytest.CaptureFixture[str],
                                                          key: str, value: str) -> None:
    toml = study_dir / "study.toml"
    text = toml.read_text().replace(f'{key} = "{key}.geojson"', f'{key} = "{value}"')
    assert value in text
    toml.write_text(text)
    result = cli(capsys, "--study", str(study_dir), "status")
    assert_refused(result, "study.toml", "outside the study folder")


# ------------------------------------------------------------------------------ SQL
HOSTILE = "x'); DROP TABLE ingests; --\"; SELECT 1 --"


@pytest.mark.slow  # ingests and exports every kind under hostile names
def test_names_built_to_break_sql_are_stored_verbatim(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Quotes and semicolons in: the study folder's path, the source id, the protocol, the
    # provider's column names, a taxon name and its alias, a life stage and the file names.
    # Identifiers must be quoted and values bound as parameters, so every one of them comes
    # back exactly as given and every table survives.
    root = tmp_path / "st'u\"dy; DROP TABLE quarantine; --"
    shutil.copytree(FIXTURES / "keldmar", root)
    profile = (root / "profiles" / "trawl_agency.toml").read_text()
    profile = (profile.replace('id = "keldmar_trawl"', 'id = "keld\'mar\\"; DROP TABLE ingests; --"')
               .replace('protocol = "keldmar_bottom_trawl"', 'protocol = "proto\'col; --"')
               .replace('event_id = "HAUL_NO"', 'event_id = "HAUL\'NO\\"; --"')
               .replace('taxon = "SPECIES"', 'taxon = "SPE\\"CIES\'); --"'))
    (root / "profiles" / "trawl_agency.toml").write_text(profile)
    (root / "targets.csv").write_text((root / "targets.csv").read_text().replace("keldmar_bottom_trawl", "proto'col; --"))
    taxon = "Gadus o'hara\"; DROP TABLE observation_files; --"
    with open(root / "taxa.csv", "a", newline="") as fh:
        csv.writer(fh).writerow([taxon, "fish", "o'hara \"cod\"; --", "false"])
    hauls = (FIXTURES / "trawl" / "hauls_messy.csv").read_text().replace("HAUL_NO", "\"HAUL'NO\"\"; --\"", 1)
    catch = (FIXTURES / "trawl" / "catch_messy.csv").read_text().replace("SPECIES", "\"SPE\"\"CIES'); --\"", 1)
    catch += "H001,\"o'hara \"\"cod\"\"; --\",700,1,\"ju'v\"\"; --\"\n"
    events, records = root / "hauls'; DROP TABLE x; --.csv", root / "catch\"; --.csv"
    events.write_text(hauls)
    records.write_text(catch)

    code, out, err = cli(capsys, "--study", str(root), "ingest", "trawl_agency", "--events", str(events),
                         "--records", str(records))
    assert code == 0, err
    code, out, err = cli(capsys, "--study", str(root), "status", "--check")
    assert code == 0, err
    assert "integrity check passed" in out
    store = Store(load_study(root).store_dir)
    with store.connect() as con:
        tables = {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
        assert {"ingests", "quarantine", "observation_files", "ingest_files"} <= tables
        source_ids = con.execute("SELECT DISTINCT source_id, protocol, source_file FROM observations").fetchall()
        assert source_ids == [("keld'mar\"; DROP TABLE ingests; --", "proto'col; --", events.name)]
        rows = con.execute("""SELECT life_stage, quantity, round(value, 9) FROM observations
                              WHERE variable = ? AND NOT zero_filled ORDER BY quantity""", [taxon]).fetchall()
        assert rows == [("ju'v\"; --", "biomass", 0.7), ("ju'v\"; --", "count", 1.0)]  # 700 g, under its alias
        files = con.execute("SELECT DISTINCT source_file FROM quarantine").fetchall()
        assert {f for (f,) in files} <= {events.name, records.name}
    # the audit and every export run over these names
    for args in (["audit", "--json", str(tmp_path / "a.json"), "--html", str(tmp_path / "a.html")],
                 ["export", "long", str(tmp_path / "long.parquet")], ["export", "wide", str(tmp_path / "wide.csv")],
                 ["export", "grid", str(tmp_path / "grid.csv")], ["export", "gpkg", str(tmp_path / "cover.gpkg")],
                 ["export", "dwca", str(tmp_path / "dwca.zip")]):
        code, _, err = cli(capsys, "--study", str(root), *args)
        assert code == 0, (args, err)
    with duckdb.connect() as con:
        wide_cols = [r[0] for r in con.execute("DESCRIBE SELECT * FROM read_csv(?)", [str(tmp_path / "wide.csv")]).fetchall()]
        long_ids = con.execute("SELECT DISTINCT source_id FROM read_parquet(?)", [str(tmp_path / "long.parquet")]).fetchall()
    assert any(c.startswith(taxon + " (") for c in wide_cols)
    assert long_ids == [("keld'mar\"; DROP TABLE ingests; --",)]
    assert Store(load_study(root).store_dir).check() == []
    # the quarantine export keeps the names verbatim too
    code, _, err = cli(capsys, "--study", str(root), "quarantine", "--csv", str(tmp_path / "q.csv"))
    assert code == 0, err
    with duckdb.connect() as con:
        q = con.execute("SELECT * FROM read_csv(?, all_varchar = true)", [str(tmp_path / "q.csv")]).df()
    assert set(q["source_id"]) == {"keld'mar\"; DROP TABLE ingests; --"}


def test_names_built_to_break_sql_in_the_ping_pipeline(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # The effort adapter runs its checks as DuckDB SQL over the provider's own column names.
    root = tmp_path / "pi'n\"gs; --" / "study"
    shutil.copytree(FIXTURES / "keldmar", root)
    prof = root / "profiles" / "effort_pings.toml"
    prof.write_text(prof.read_text().replace('vessel_id = "vessel"', 'vessel_id = "ves\'sel\\"; --"')
                    .replace('time = "time_utc"', 'time = "ti\\"me); DROP TABLE p; --"')
                    .replace('id = "keldmar_pings"', 'id = "pings\'; DELETE FROM ingests; --"'))
    pings = (FIXTURES / "effort" / "pings_hand.csv").read_text().splitlines()
    pings[0] = pings[0].replace("vessel", '"ves\'sel""; --"').replace("time_utc", '"ti""me); DROP TABLE p; --"')
    pings = [pings[0]] + [line.replace("ALPHA-1", '"AL\'PHA""; DROP TABLE x; --"') for line in pings[1:]]
    path = root / "pings'; --.csv"
    path.write_text("\n".join(pings) + "\n")
    code, _, err = cli(capsys, "--study", str(root), "ingest", "effort_pings", str(path))
    assert code == 0, err
    code, out, err = cli(capsys, "--study", str(root), "status", "--check")
    assert code == 0 and "integrity check passed" in out, err
    with Store(root / "store").connect() as con:
        assert con.execute("SELECT DISTINCT source_id, source_file FROM observations").fetchall() == [
            ("pings'; DELETE FROM ingests; --", path.name)]
        assert con.execute("SELECT count(*) FROM ingests").fetchall()[0][0] == 1


@pytest.mark.parametrize("folder", [
    # the fast lane runs one folder name holding every character; make test also each set alone
    "glob[1]*{a,b} sp ace #1 %20 ~",
    pytest.param("glob[1]*{a,b}", marks=pytest.mark.slow), pytest.param("sp ace #1 %20 ~", marks=pytest.mark.slow)])
def test_study_folder_names_with_glob_and_url_characters_work(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                              folder: str) -> None:
    # DuckDB globs in read_parquet/read_csv paths: the store's files must still be found
    root = tmp_path / folder / "study"
    shutil.copytree(FIXTURES / "keldmar", root)
    files = ["--events", str(FIXTURES / "trawl" / "hauls_messy.csv"), "--records", str(FIXTURES / "trawl" / "catch_messy.csv")]
    for args in (["ingest", "trawl_agency", *files], ["status", "--check"], ["audit", "--json", str(root / "a.json")],
                 ["export", "long", str(root / "long.parquet")], ["export", "dwca", str(root / "out.zip")]):
        code, _, err = cli(capsys, "--study", str(root), *args)
        assert code == 0, (args, err)
    with Store(root / "store").connect() as con:
        assert con.execute("SELECT count(*) FROM observations").fetchall()[0][0] == 29  # H011: season year 2020, outside a 2015-2019 target window


def test_study_folder_with_a_question_mark_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # DuckDB 2.0 cuts a database path at '?' when naming its write-ahead log: refused up front
    root = tmp_path / "what?" / "study"
    shutil.copytree(FIXTURES / "keldmar", root)
    result = cli(capsys, "--study", str(root), "ingest", "trawl_agency", "--events",
                 str(FIXTURES / "trawl" / "hauls_messy.csv"), "--records", str(FIXTURES / "trawl" / "catch_messy.csv"))
    assert_refused(result, "does not accept a '?' in a database path")
    assert not (root / "store").exists()


def test_hostile_raw_rows_round_trip_through_quarantine(study_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # A rejected row full of quotes, semicolons, NUL and line breaks is kept exactly, as JSON.
    evil = ["H'1\"; DROP TABLE quarantine; --", "not a time\x00", "2020-06-10T08:30:00", "43", "-153",
            "43.02", "-153", "", "20", "50", "line\nbreak"]
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerow(evil)
    (study_dir / "hauls_messy.csv").write_text((study_dir / "hauls_messy.csv").read_text() + buf.getvalue())
    code, _, err = cli(capsys, "--study", str(study_dir), "ingest", "trawl_agency",
                       "--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv"))
    assert code == 0, err
    store = Store(study_dir / "store")
    q = store.quarantine(reason="bad_time")
    raws = [json.loads(r) for r in q["raw"]]
    mine = [r for r in raws if r["HAUL_NO"] == evil[0]]
    assert len(mine) == 1 and mine[0]["START"] == evil[1] and mine[0]["BOT_TEMP"] == evil[-1]
    message = q.loc[[json.loads(r)["HAUL_NO"] == evil[0] for r in q["raw"]], "message"].iloc[0]
    assert "\n" not in message and "\x00" not in message and "\\x00" in message
    assert store.check() == []


# ------------------------------------------------------------------------------ damaged store
def _ingested(study_dir: Path, capsys: pytest.CaptureFixture[str]) -> Path:
    code, _, err = cli(capsys, "--study", str(study_dir), "ingest", "trawl_agency",
                       "--events", str(study_dir / "hauls_messy.csv"), "--records", str(study_dir / "catch_messy.csv"))
    assert code == 0, err
    return next((study_dir / "store" / "observations").rglob("*.parquet"))


@pytest.mark.parametrize("damage", ["deleted", "truncated"])
def test_damaged_parquet_file_is_named_by_the_check(study_dir: Path, capsys: pytest.CaptureFixture[str],
                                                   damage: str) -> None:
    part = _ingested(study_dir, capsys)
    if damage == "deleted":
        part.unlink()
    else:
        part.write_bytes(part.read_bytes()[:1000])  # a copy that stopped half-way
    code, out, _ = cli(capsys, "--study", str(study_dir), "status", "--check")
    assert code == 1
    problem = [line for line in out.splitlines() if line.startswith("integrity problem")]
    expected = "is missing" if damage == "deleted" else "has 1,000 bytes, the manifest recorded"
    assert len(problem) == 1 and expected in out and part.name[:12] in out.replace("\n", ""), out
    # every other verb refuses in one line and points to the check
    result = cli(capsys, "--study", str(study_dir), "status")
    assert_refused(result, "harmonize status --check")


@pytest.mark.parametrize("content", [b"garbage", b"\0" * 5000], ids=["text", "zeros"])
def test_damaged_database_file_is_refused_in_one_line(study_dir: Path, capsys: pytest.CaptureFixture[str],
                                                      content: bytes) -> None:
    _ingested(study_dir, capsys)
    (study_dir / "store" / "harmonized.duckdb").write_bytes(content)
    assert_refused(cli(capsys, "--study", str(study_dir), "status", "--check"), "cannot open the store")
