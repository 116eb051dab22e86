"""Darwin Core input: term names against TDWG, archives and plain tables, hostile archives."""

from __future__ import annotations

import csv
import shutil
import zipfile
from pathlib import Path

import pytest

from harmonize import Store, load_study, run
from harmonize.adapters import darwin_core
from harmonize.adapters.darwin_core import ArchiveLimits, read_archive
from harmonize.errors import InputFileError

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures" / "opportunistic"
TERMS = Path("/work/shared/reference/darwin_core_terms.csv")
if not TERMS.is_file():  # the reference table also sits beside the repository in some checkouts
    TERMS = Path(__file__).resolve().parents[2] / "shared" / "reference" / "darwin_core_terms.csv"


def _zip(path: Path, members: dict[str, bytes | str], compression: int = zipfile.ZIP_DEFLATED) -> Path:
    with zipfile.ZipFile(path, "w", compression) as zf:
        for name, data in members.items():
            zf.writestr(zipfile.ZipInfo(name) if name.startswith("/") else name,
                        data.encode() if isinstance(data, str) else data)
    return path


def _archive(study_dir: Path, name: str = "checklists.zip") -> Path:
    src = FIXTURES / "dwca_checklists"
    return _zip(study_dir / name, {f.name: f.read_bytes() for f in sorted(src.iterdir())})


def _profile(study_dir: Path, name: str, extra: str = "") -> str:
    text = (study_dir / "profiles" / "opportunistic_dwc.toml").read_text()
    (study_dir / "profiles" / f"{name}.toml").write_text(text.replace("keldmar_birdportal", name) + extra)
    return name


# --------------------------------------------------------------------------- TDWG terms
def test_mapped_terms_and_row_types_are_recommended_darwin_core_terms() -> None:
    # Darwin Core Maintenance Group, "Darwin Core List of Terms" (TDWG), term_versions.csv
    with open(TERMS, encoding="utf-8") as fh:
        iris = {row["iri"] for row in csv.DictReader(fh)}
    used = {t for terms in darwin_core.FIELD_TERMS.values() for t in terms}
    assert {darwin_core.DWC + t for t in used} <= iris
    assert {darwin_core.ROW_OCCURRENCE, darwin_core.ROW_EVENT} <= iris
    assert {darwin_core.DWC + t for t in ("eventTime", "samplingEffort", "vernacularName")} <= iris


def test_term_names_from_headers_and_iris() -> None:
    assert darwin_core.short_term("http://rs.tdwg.org/dwc/terms/eventDate") == "eventDate"
    assert darwin_core.short_term("dwc:decimalLatitude") == "decimalLatitude"
    cols = ["http://rs.tdwg.org/dwc/terms/scientificName", "decimalLatitude", "decimalLongitude", "eventDate"]
    assert darwin_core.looks_like_dwc(cols)
    mapping = darwin_core.default_columns(cols, {"lat": "my_lat"})
    assert mapping == {"time": "eventDate", "lon": "decimalLongitude",
                       "taxon": "http://rs.tdwg.org/dwc/terms/scientificName"}
    assert not darwin_core.looks_like_dwc(["species", "lat", "lon"])


# --------------------------------------------------------------------------- reading
def test_event_core_archive_of_complete_checklists(study_dir: Path) -> None:
    archive = _archive(study_dir)
    name = _profile(study_dir, "portal_lists", "\n[constants]\ncomplete = true\n")
    study = load_study(study_dir)
    result = run(study, name, {"rows": archive})
    # 4 occurrences + 1 event without any (nothing seen)
    assert result.rows_read == 5 and result.rows_accepted == 4
    assert result.quarantine[["source_row", "reason_code"]].values.tolist() == [[4, "orphan_record"]]
    assert "'E9', which is not in the event core" in result.quarantine["message"].iloc[0]
    with Store(study.store_dir).connect() as con:
        obs = con.execute("""SELECT event_id, variable, quantity, value, effort, zero_filled FROM observations
                             ORDER BY event_id, variable""").fetchall()
    assert obs == [
        # E1: eventDate interval 07:30-09:00 -> 1.5 h; an explicit absence is a reported zero
        ("E1", "Aukelle minima", "count", 0.0, 1.5, True),
        ("E1", "Larivox pallens", "count", 0.0, 1.5, False),
        ("E1", "Procellix keldica", "count", 7.0, 1.5, False),
        # E2: samplingEffort "45 minutes"; a record without a count is a presence
        ("E2", "Aukelle minima", "presence", 1.0, None, False),
        ("E2", "Larivox pallens", "count", 0.0, 0.75, True),
        ("E2", "Procellix keldica", "count", 0.0, 0.75, True),
        # E3: samplingEffort "PT2H" and no occurrence at all: zeros for every target
        ("E3", "Aukelle minima", "count", 0.0, 2.0, True),
        ("E3", "Larivox pallens", "count", 0.0, 2.0, True),
        ("E3", "Procellix keldica", "count", 0.0, 2.0, True),
    ]
    assert Store(study.store_dir).check() == []


def test_archive_checklists_not_marked_complete_are_presence_only(study_dir: Path) -> None:
    archive = _archive(study_dir)
    result = run(load_study(study_dir), "opportunistic_dwc", {"rows": archive})
    reasons = dict(zip(result.quarantine["source_row"], result.quarantine["reason_code"], strict=True))
    assert reasons == {2: "absence_outside_checklist", 4: "orphan_record", 5: "missing_value"}
    with Store(study_dir / "store").connect() as con:
        kinds = con.execute("SELECT DISTINCT quantity, zero_filled, effort FROM observations").fetchall()
    assert kinds == [("presence", False, None)]


def test_plain_darwin_core_table_needs_no_columns_section(study_dir: Path) -> None:
    shutil.copy(FIXTURES / "portal_occurrences.csv", study_dir)
    study = load_study(study_dir)
    result = run(study, "opportunistic_dwc", {"rows": study_dir / "portal_occurrences.csv"})
    reasons = dict(zip(result.quarantine["source_row"], result.quarantine["reason_code"], strict=True))
    assert reasons == {4: "out_of_range", 5: "absence_outside_checklist"}
    assert "contradicts occurrence status 'absent'" in result.quarantine["message"].iloc[0]
    with Store(study.store_dir).connect() as con:
        rows = con.execute("""SELECT event_start, event_end, variable, behavior, quantity, flags FROM observations
                              ORDER BY source_row""").fetchall()
    start, end, variable, behavior, quantity, flags = rows[0]
    # eventDate 2023-10-21 + eventTime 07:45:00Z; behavior "in flight" -> in_flight
    assert (str(start), variable, behavior, quantity) == ("2023-10-21 07:45:00+00:00", "Procellix keldica", "in_flight", "presence")
    # p2 has only a vernacular name and a date: the whole day is its time window
    assert rows[1][2] == "Procellix keldica" and "date_only" in rows[1][5]
    assert str(rows[1][0]) == "2023-10-24 00:00:00+00:00" and str(rows[1][1]) == "2023-10-25 00:00:00+00:00"


def test_profile_columns_override_the_standard_mapping(study_dir: Path) -> None:
    data = study_dir / "portal.csv"
    data.write_text(
        "occurrenceID,eventDate,decimalLatitude,decimalLongitude,scientificName,localName\n"
        "a1,2023-10-21T08:00Z,44.1,-151.4,Ostravix keldensis,pale gull\n"
    )
    name = _profile(study_dir, "portal_local", '\n[columns]\ntaxon = "localName"\n')
    run(load_study(study_dir), name, {"rows": data})
    with Store(study_dir / "store").connect() as con:
        assert con.execute("SELECT variable FROM observations").fetchall() == [("Larivox pallens",)]


def test_occurrence_core_archive_without_header_and_with_quotes(tmp_path: Path) -> None:
    meta = """<archive xmlns="http://rs.tdwg.org/dwc/text/">
      <core rowType="http://rs.tdwg.org/dwc/terms/Occurrence" fieldsTerminatedBy="," ignoreHeaderLines="0">
        <files><location>data/occ.csv</location></files>
        <id index="0"/>
        <field index="0" term="http://rs.tdwg.org/dwc/terms/occurrenceID"/>
        <field index="1" term="http://rs.tdwg.org/dwc/terms/scientificName"/>
        <field index="2" term="http://rs.tdwg.org/dwc/terms/recordedBy"/>
        <field term="http://rs.tdwg.org/dwc/terms/occurrenceStatus" default="present"/>
      </core>
      <extension rowType="http://rs.iobis.org/obis/terms/ExtendedMeasurementOrFact">
        <files><location>emof.txt</location></files><coreid index="0"/>
      </extension></archive>"""
    path = _zip(tmp_path / "occ.zip", {"meta.xml": meta, "data/occ.csv": 'o1,"Larivox pallens","Vell, Ann"\no2,Aukelle minima\n',
                                       "emof.txt": ""})
    table = read_archive(path)
    frame = table.table.frame
    assert frame["recordedBy"].tolist() == ["Vell, Ann", ""]
    assert frame["occurrenceStatus"].tolist() == ["present", "present"]
    assert table.malformed == [(2, "o2,Aukelle minima", 2)]
    assert "ExtendedMeasurementOrFact" in table.notes[0]


# --------------------------------------------------------------------------- hostile archives
# Python docs, zipfile, "Decompression pitfalls" (zip bombs, path traversal) and the
# "XML vulnerabilities" table (billion laughs, external entity expansion).
META_OK = (FIXTURES / "dwca_checklists" / "meta.xml").read_text()


@pytest.mark.parametrize("name", ["../evil.txt", "/etc/passwd", "data/../../x.txt", "C:\\temp\\x.txt"])
def test_path_traversal_names_are_refused(tmp_path: Path, name: str) -> None:
    path = _zip(tmp_path / "bad.zip", {"meta.xml": META_OK, name: "x"})
    with pytest.raises(InputFileError, match="refused"):
        read_archive(path)


def test_zip_bomb_ratio_and_size_caps(tmp_path: Path) -> None:
    bomb = _zip(tmp_path / "bomb.zip", {"meta.xml": META_OK, "event.txt": b"\0" * (20 * 1024**2)})
    with pytest.raises(InputFileError, match="would expand .* times .*decompression bomb"):
        read_archive(bomb)
    stored = _zip(tmp_path / "big.zip", {"meta.xml": META_OK, "event.txt": b"x" * 4096},
                  compression=zipfile.ZIP_STORED)
    with pytest.raises(InputFileError, match="would unpack to more than"):
        read_archive(stored, limits=ArchiveLimits(max_total_bytes=2048))
    with pytest.raises(InputFileError, match="members, more than"):
        read_archive(stored, limits=ArchiveLimits(max_members=1))


BILLION_LAUGHS = """<?xml version="1.0"?>
<!DOCTYPE lolz [<!ENTITY lol "lol"><!ENTITY lol2 "&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;">
<!ENTITY lol3 "&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;">]>
<archive xmlns="http://rs.tdwg.org/dwc/text/"><core rowType="&lol3;"/></archive>"""
EXTERNAL = """<?xml version="1.0"?>
<!DOCTYPE archive [<!ENTITY ext SYSTEM "file:///etc/passwd">]>
<archive xmlns="http://rs.tdwg.org/dwc/text/"><core rowType="&ext;"/></archive>"""


@pytest.mark.parametrize("meta", [BILLION_LAUGHS, EXTERNAL])
def test_xml_entities_in_meta_are_refused(tmp_path: Path, meta: str) -> None:
    path = _zip(tmp_path / "xml.zip", {"meta.xml": meta})
    with pytest.raises(InputFileError, match="DTD or XML entities"):
        read_archive(path)


@pytest.mark.parametrize(("members", "match"), [
    ({"meta.xml": META_OK.replace("event.txt", "missing.txt"), "occurrence.txt": ""}, "names the file 'missing.txt'"),
    ({"meta.xml": "<archive><core"}, "not well-formed XML"),
    ({"meta.xml": "<archive/>"}, "declares 0 core files"),
    ({"a.txt": "x", "b.txt": "y"}, "no meta.xml and not exactly one data file"),
])
def test_broken_archives_give_one_line_errors(tmp_path: Path, members: dict[str, str], match: str) -> None:
    with pytest.raises(InputFileError, match=match) as err:
        read_archive(_zip(tmp_path / "broken.zip", members))
    assert "\n" not in str(err.value)


def test_not_a_zip_is_an_input_error(tmp_path: Path) -> None:
    path = tmp_path / "fake.zip"
    path.write_bytes(b"PK\x03\x04 not really")
    with pytest.raises(InputFileError, match="not a readable zip"):
        read_archive(path)


def test_archive_members_are_never_written_to_disk(tmp_path: Path) -> None:
    path = _zip(tmp_path / "a.zip", {"meta.xml": META_OK, "event.txt": (FIXTURES / "dwca_checklists" / "event.txt").read_text(),
                                     "occurrence.txt": (FIXTURES / "dwca_checklists" / "occurrence.txt").read_text()})
    before = sorted(p.name for p in tmp_path.rglob("*"))
    read_archive(path)
    assert sorted(p.name for p in tmp_path.rglob("*")) == before


def test_a_field_index_beyond_any_table_is_refused(tmp_path: Path) -> None:
    # every row is padded to the widest index: an index of 1e20 asked for all the memory there is
    meta = """<archive xmlns="http://rs.tdwg.org/dwc/text/">
      <core rowType="http://rs.tdwg.org/dwc/terms/Occurrence" fieldsTerminatedBy="," ignoreHeaderLines="0">
        <files><location>occ.csv</location></files>
        <id index="0"/>
        <field index="0" term="http://rs.tdwg.org/dwc/terms/occurrenceID"/>
        <field index="100000000000000000000" term="http://rs.tdwg.org/dwc/terms/scientificName"/>
      </core></archive>"""
    path = _zip(tmp_path / "wide.zip", {"meta.xml": meta, "occ.csv": "o1,Larivox pallens\n"})
    with pytest.raises(InputFileError, match=r"meta\.xml: index 100000000000000000000 of .* is beyond any "
                                             r"table's width \(at most 10,000 columns\)") as err:
        read_archive(path)
    assert "\n" not in str(err.value)
