"""Darwin Core Archive: structure per the Darwin Core text guide, term URIs, absences, sensitivity."""

from __future__ import annotations

import csv
import io
import zipfile
from pathlib import Path

import defusedxml.ElementTree as SafeET
import pytest
from export_store import V_POS, ExportStore, export_study

import harmonize
from harmonize.export.dwca import export_dwca, read_archive_table
from harmonize.export.metadata import read_export_metadata

# TDWG Darwin Core quick reference, recommended terms (Darwin Core Maintenance Group,
# "Darwin Core List of Terms", vocabulary/term_versions.csv), shipped in the shared references.
REFERENCE = Path("/work/shared/reference/darwin_core_terms.csv")
TEXT = "{http://rs.tdwg.org/dwc/text/}"


@pytest.fixture(scope="module")
def archive(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, ExportStore]:
    folder = tmp_path_factory.mktemp("dwca")
    study, built = export_study(folder / "study")
    return export_dwca(study, folder / "dwca.zip").path, built


def _recommended_iris() -> set[str]:
    if not REFERENCE.is_file():
        pytest.skip("the shared Darwin Core reference list is not available here")
    with REFERENCE.open(encoding="utf-8") as fh:
        return {row["iri"] for row in csv.DictReader(fh)}


def _tables(path: Path) -> dict[str, list[dict[str, str]]]:
    with zipfile.ZipFile(path) as zf:
        out = {}
        for name in ("event.txt", "occurrence.txt", "extendedmeasurementorfact.txt"):
            text = zf.read(name).decode("utf-8")
            out[name] = list(csv.DictReader(io.StringIO(text), delimiter="\t", quoting=csv.QUOTE_NONE))
    return out


def test_meta_xml_follows_the_text_guide(archive: tuple[Path, ExportStore]) -> None:
    path, _ = archive
    iris = _recommended_iris()
    with zipfile.ZipFile(path) as zf:
        assert set(zf.namelist()) == {"meta.xml", "eml.xml", "event.txt", "occurrence.txt",
                                      "extendedmeasurementorfact.txt"}
        root = SafeET.fromstring(zf.read("meta.xml"))
        assert root.tag == f"{TEXT}archive" and root.get("metadata") == "eml.xml"
        cores = root.findall(f"{TEXT}core")
        extensions = root.findall(f"{TEXT}extension")
        # Darwin Core text guide: exactly one core; with extensions the core has an id and
        # each extension a coreid; row types from the standard
        assert len(cores) == 1 and cores[0].get("rowType") == "http://rs.tdwg.org/dwc/terms/Event"
        assert cores[0].find(f"{TEXT}id") is not None
        assert sorted(e.get("rowType") for e in extensions) == [
            "http://rs.iobis.org/obis/terms/ExtendedMeasurementOrFact", "http://rs.tdwg.org/dwc/terms/Occurrence"]
        for section in [*cores, *extensions]:
            assert section.get("fieldsTerminatedBy") == "\\t" and section.get("ignoreHeaderLines") == "1"
            if section in extensions:
                assert section.find(f"{TEXT}coreid") is not None
            location = section.find(f"{TEXT}files/{TEXT}location").text
            header = zf.read(location).decode("utf-8").split("\n", 1)[0].split("\t")
            fields = section.findall(f"{TEXT}field")
            terms = [f.get("term") for f in fields]
            assert [int(f.get("index")) for f in fields] == list(range(len(header)))
            # every column maps to a recommended Darwin Core term, named as its header
            assert set(terms) <= iris, set(terms) - iris
            assert [t.rsplit("/", 1)[1] for t in terms] == header


def test_ids_link_core_and_extensions(archive: tuple[Path, ExportStore]) -> None:
    tables = _tables(archive[0])
    event_ids = [r["eventID"] for r in tables["event.txt"]]
    assert len(event_ids) == len(set(event_ids)) == 8            # G1 (gridded model), E2 (2 vessels) left out
    assert "ocean_model:G1" not in event_ids
    occ_ids = {r["occurrenceID"] for r in tables["occurrence.txt"]}
    assert {r["eventID"] for r in tables["occurrence.txt"]} <= set(event_ids)
    assert {r["eventID"] for r in tables["extendedmeasurementorfact.txt"]} <= set(event_ids)
    linked = {r["occurrenceID"] for r in tables["extendedmeasurementorfact.txt"] if r["occurrenceID"]}
    assert linked <= occ_ids
    # an id is guarded as a whole cell: "volunteer_birds:@V2" starts with a letter, left as is
    assert "volunteer_birds:@V2" in event_ids
    assert "volunteer_birds:@V2:Procellix keldica" in occ_ids


def test_absences_and_twins(archive: tuple[Path, ExportStore]) -> None:
    occ = {r["occurrenceID"]: r for r in _tables(archive[0])["occurrence.txt"]}
    absent = occ["survey_trawl:T2:Ostravix keldensis"]
    assert absent["occurrenceStatus"] == "absent" and absent["individualCount"] == "0"
    assert absent["occurrenceRemarks"].startswith("absence inferred")
    assert occ["survey_trawl:T1:Lumbrena pallida"]["occurrenceStatus"] == "absent"
    assert occ["survey_trawl:T1:Ostravix keldensis:juvenile"]["individualCount"] == "4"
    assert occ["volunteer_birds:@V2:Larivox pallens"]["occurrenceStatus"] == "present"
    assert occ["volunteer_birds:@V2:Larivox pallens"]["individualCount"] == ""   # presence-only
    assert "volunteer_birds:V1:Aukelle minima" not in occ        # probable twin left out
    assert "volunteer_birds:V1:Larivox pallens" in occ


def test_sensitive_taxa_are_generalised(archive: tuple[Path, ExportStore]) -> None:
    events = {r["eventID"]: r for r in _tables(archive[0])["event.txt"]}
    # Chapman 2020 (GBIF, doi 10.15468/doc-5jp4-5g10): round to 0.1 degree and say so
    v2 = events["volunteer_birds:@V2"]                        # Aukelle minima seen (presence)
    lat, lon = V_POS["@V2"]
    assert float(v2["decimalLatitude"]) == round(lat, 1) and float(v2["decimalLongitude"]) == round(lon, 1)
    assert v2["coordinatePrecision"] == "0.1" and v2["locationID"] == ""
    assert "sensitive" in v2["dataGeneralizations"] and "withheld" in v2["informationWithheld"]
    t1 = events["survey_trawl:T1"]                             # 2 Calverion rubrum caught
    assert t1["dataGeneralizations"] != ""
    t2 = events["survey_trawl:T2"]                             # Calverion rubrum absent: exact
    assert float(t2["decimalLatitude"]) == 43.5 and t2["dataGeneralizations"] == "" and t2["locationID"] != ""
    # V1's Aukelle record is a probable twin, left out of the archive but kept (flagged) in the
    # long table, where it would place V1 exactly: the event is generalised in every output
    v1 = events["volunteer_birds:V1"]
    assert float(v1["decimalLatitude"]) == round(V_POS["V1"][0], 1) and v1["dataGeneralizations"] != ""


def test_effort_terms_and_confidential_fishing(archive: tuple[Path, ExportStore]) -> None:
    tables = _tables(archive[0])
    events = {r["eventID"]: r for r in tables["event.txt"]}
    t1 = events["survey_trawl:T1"]
    assert float(t1["sampleSizeValue"]) == 0.05 and t1["sampleSizeUnit"] == "square kilometre"
    assert t1["samplingProtocol"] == "keldmar_bottom_trawl" and t1["samplingEffort"].startswith("area swept")
    assert t1["eventDate"] == "2020-06-10T08:00:00Z/2020-06-10T08:30:00Z"
    assert events["volunteer_birds:V1"]["sampleSizeUnit"] == "hour"
    facts = tables["extendedmeasurementorfact.txt"]
    hours = {r["eventID"]: r["measurementValue"] for r in facts if r["measurementType"] == "fishing hours"}
    assert hours == {"fleet_effort:E1": "12.0", "fleet_effort:E3": "7.5"}     # E2: 2 vessels, withheld
    assert "fleet_effort:E2" not in events          # no Event row: its cell and month would place the vessels
    density = [r for r in facts if r["measurementID"].endswith(":density")
               and r["occurrenceID"] == "survey_trawl:T1:Calverion rubrum"]
    assert float(density[0]["measurementValue"]) == pytest.approx(2.0 / 0.05)
    assert density[0]["measurementUnit"] == "individuals/km2"


def test_eml_parses_and_carries_provenance(archive: tuple[Path, ExportStore]) -> None:
    path, built = archive
    with zipfile.ZipFile(path) as zf:
        eml = SafeET.fromstring(zf.read("eml.xml"))
    assert eml.tag == "{https://eml.ecoinformatics.org/eml-2.2.0}eml"
    assert eml.find("dataset/title").text.endswith("harmonised survey records")
    box = eml.find("dataset/coverage/geographicCoverage/boundingCoordinates")
    assert float(box.find("westBoundingCoordinate").text) <= -153.0
    meta = read_export_metadata(path)
    assert meta["tool_version"] == harmonize.__version__
    assert {i["ingest_id"] for i in meta["ingests"]} == set(built.ingests.values())
    assert meta["options"]["events_generalised"] == 3 and meta["options"]["fishing_values_withheld"] == 1
    assert meta["options"]["occurrence_rows_probable_duplicate"] == 1
    assert read_archive_table(path, "occurrence.txt")["occurrenceStatus"].isin(["present", "absent"]).all()


def test_text_cells_are_scrubbed_and_guarded() -> None:
    import duckdb

    from harmonize.export.dwca import _clean

    con = duckdb.connect()
    # tabs and line breaks would break an unquoted tab-separated file (Darwin Core text guide);
    # a leading = is guarded as OWASP ASVS 5.0 V1.2.10 asks
    got = con.execute(f"SELECT {_clean(chr(39) + '=A1' + chr(9) + 'x' + chr(10) + 'y' + chr(39))}").fetchall()[0][0]
    con.close()
    assert got == "'=A1 x y"
