"""Darwin Core Archive: structure per the Darwin Core text guide, term URIs, absences, sensitivity."""

from __future__ import annotations

import csv
import io
import zipfile
from pathlib import Path
from urllib.parse import quote, unquote

import defusedxml.ElementTree as SafeET
import pytest
from export_store import V_POS, ExportStore, export_study

import harmonize
from harmonize.export.dwca import export_dwca, read_archive_table
from harmonize.export.metadata import read_export_metadata

# TDWG Darwin Core quick reference, recommended terms (Darwin Core Maintenance Group,
# "Darwin Core List of Terms", vocabulary/term_versions.csv; CC BY 4.0), kept in fixtures/reference.
REFERENCE = Path(__file__).resolve().parent.parent / "fixtures" / "reference" / "darwin_core_terms.csv"
TEXT = "{http://rs.tdwg.org/dwc/text/}"
# The two terms of the OBIS Extended Measurement or Fact extension that Darwin Core lacks (OBIS
# Manual, "Extended MeasurementOrFact extension"; namespace http://rs.iobis.org/obis/terms/).
OBIS_TERMS = {"http://rs.iobis.org/obis/terms/measurementTypeID", "http://rs.iobis.org/obis/terms/measurementUnitID"}


def enc(*parts: str) -> str:
    """An archive id as written: RFC 3986 percent-encoding of each part ('/' kept), joined by ':'."""
    return ":".join(quote(p, safe="/") for p in parts)


@pytest.fixture(scope="module")
def archive(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, ExportStore]:
    folder = tmp_path_factory.mktemp("dwca")
    study, built = export_study(folder / "study")
    return export_dwca(study, folder / "dwca.zip").path, built


def _recommended_iris() -> set[str]:
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
            # every column maps to a recommended Darwin Core term (or one of the two OBIS eMoF
            # terms in the OBIS extension), named as its header
            allowed = iris | (OBIS_TERMS if section.get("rowType").startswith("http://rs.iobis.org") else set())
            assert set(terms) <= allowed, set(terms) - allowed
            assert [t.rsplit("/", 1)[1] for t in terms] == header


def test_ids_link_core_and_extensions(archive: tuple[Path, ExportStore]) -> None:
    tables = _tables(archive[0])
    event_ids = [r["eventID"] for r in tables["event.txt"]]
    # G1 (gridded model) left out; fishing effort (E1, E3; E2 rests on 2 vessels) only on request
    assert len(event_ids) == len(set(event_ids)) == 6
    assert "ocean_model:G1" not in event_ids
    occ_ids = {r["occurrenceID"] for r in tables["occurrence.txt"]}
    assert {r["eventID"] for r in tables["occurrence.txt"]} <= set(event_ids)
    assert {r["eventID"] for r in tables["extendedmeasurementorfact.txt"]} <= set(event_ids)
    linked = {r["occurrenceID"] for r in tables["extendedmeasurementorfact.txt"] if r["occurrenceID"]}
    assert linked <= occ_ids
    # an id is guarded as a whole cell: "volunteer_birds:@V2" starts with a letter, left as is
    assert "volunteer_birds:%40V2" in event_ids
    assert "volunteer_birds:%40V2:Procellix%20keldica" in occ_ids
    # no id holds a space, and each decodes to its parts (RFC 3986 percent-decoding)
    for ident in [*event_ids, *occ_ids, *(r["measurementID"] for r in tables["extendedmeasurementorfact.txt"])]:
        assert " " not in ident and "\t" not in ident, ident
    assert [unquote(p) for p in "volunteer_birds:%40V2:Procellix%20keldica".split(":")] == [
        "volunteer_birds", "@V2", "Procellix keldica"]


def test_absences_and_twins(archive: tuple[Path, ExportStore]) -> None:
    occ = {r["occurrenceID"]: r for r in _tables(archive[0])["occurrence.txt"]}
    absent = occ[enc("survey_trawl", "T2", "Ostravix keldensis")]
    assert absent["occurrenceStatus"] == "absent" and absent["individualCount"] == "0"
    assert absent["occurrenceRemarks"].startswith("absence inferred")
    assert occ[enc("survey_trawl", "T1", "Lumbrena pallida")]["occurrenceStatus"] == "absent"
    assert occ[enc("survey_trawl", "T1", "Ostravix keldensis", "juvenile")]["individualCount"] == "4"
    assert occ[enc("volunteer_birds", "@V2", "Larivox pallens")]["occurrenceStatus"] == "present"
    assert occ[enc("volunteer_birds", "@V2", "Larivox pallens")]["individualCount"] == ""   # presence-only
    assert enc("volunteer_birds", "V1", "Aukelle minima") not in occ        # probable twin left out
    assert enc("volunteer_birds", "V1", "Larivox pallens") in occ


def test_sensitive_taxa_are_generalised(archive: tuple[Path, ExportStore]) -> None:
    events = {r["eventID"]: r for r in _tables(archive[0])["event.txt"]}
    # Chapman 2020 (GBIF, doi 10.15468/doc-5jp4-5g10): round to 0.1 degree and say so
    v2 = events[enc("volunteer_birds", "@V2")]                        # Aukelle minima seen (presence)
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
    # fishing effort is not a sample of organisms: not in the archive unless asked for
    assert not [r for r in facts if r["measurementType"] == "fishing hours"]
    assert not [e for e in events if e.startswith("fleet_effort:")]
    density = [r for r in facts if r["measurementID"].endswith(":density")
               and r["occurrenceID"] == enc("survey_trawl", "T1", "Calverion rubrum")]
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
    assert meta["options"]["with_effort"] is False
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


def test_fishing_effort_on_request_keeps_the_rule_of_three(archive: tuple[Path, ExportStore], tmp_path: Path) -> None:
    path = export_dwca(_study_of(archive), tmp_path / "with-effort.zip", with_effort=True).path
    tables = _tables(path)
    events = {r["eventID"] for r in tables["event.txt"]}
    facts = tables["extendedmeasurementorfact.txt"]
    hours = {r["eventID"]: r["measurementValue"] for r in facts if r["measurementType"] == "fishing hours"}
    assert hours == {"fleet_effort:E1": "12.0", "fleet_effort:E3": "7.5"}     # E2: 2 vessels, withheld
    assert "fleet_effort:E2" not in events          # no Event row: its cell and month would place the vessels
    assert {"fleet_effort:E1", "fleet_effort:E3"} <= events
    hour_units = {r["measurementUnitID"] for r in facts if r["measurementType"] == "fishing hours"}
    assert hour_units == {"http://vocab.nerc.ac.uk/collection/P06/current/UHOR/"}   # NVS P06 "Hours"


def _study_of(archive: tuple[Path, ExportStore]):  # type: ignore[no-untyped-def]
    from harmonize.study import load_study

    return load_study(archive[0].parent / "study")


def test_taxon_rank_kingdom_and_name_id_from_taxa_csv(archive: tuple[Path, ExportStore], tmp_path: Path) -> None:
    import shutil

    import pandas as pd

    from harmonize.study import load_study

    folder = tmp_path / "study"
    shutil.copytree(archive[0].parent / "study", folder)
    taxa = pd.read_csv(folder / "taxa.csv", dtype=str, keep_default_na=False)
    taxa["rank"] = "species"
    taxa["kingdom"] = "Animalia"
    # invented identifiers of an invented authority (the Keldmar taxa are fictional)
    taxa["taxon_id"] = ["urn:lsid:keldmar.example:taxname:" + str(100 + i) for i in range(len(taxa))]
    taxa.loc[taxa["taxon"] == "Lumbrena pallida", ["rank", "kingdom", "taxon_id"]] = ""
    taxa.to_csv(folder / "taxa.csv", index=False)
    path = export_dwca(load_study(folder), tmp_path / "taxa.zip").path
    occ = {r["occurrenceID"]: r for r in _tables(path)["occurrence.txt"]}
    ostravix = occ[enc("survey_trawl", "T2", "Ostravix keldensis")]
    expected_id = taxa.set_index("taxon").loc["Ostravix keldensis", "taxon_id"]
    assert (ostravix["scientificNameID"], ostravix["taxonRank"], ostravix["kingdom"]) == (
        expected_id, "species", "Animalia")
    lumbrena = occ[enc("survey_trawl", "T1", "Lumbrena pallida")]       # nothing given: empty, not guessed
    assert (lumbrena["scientificNameID"], lumbrena["taxonRank"], lumbrena["kingdom"]) == ("", "", "")


# NERC Vocabulary Server concepts, as OBIS datasets use them (from memory, checked against
# published OBIS eMoF tables): P01 OCOUNT01 "Count (in assayed sample) of biological entity
# specified elsewhere", TEMPPR01 "Temperature of the water body"; P06 UUUU "Dimensionless",
# UPAA "Degrees Celsius", KGXX "Kilograms".
P01 = "http://vocab.nerc.ac.uk/collection/P01/current/"
P06 = "http://vocab.nerc.ac.uk/collection/P06/current/"


def test_measurement_type_and_unit_ids(archive: tuple[Path, ExportStore]) -> None:
    facts = _tables(archive[0])["extendedmeasurementorfact.txt"]
    t1 = [r for r in facts if r["eventID"] == "survey_trawl:T1"]
    counts = [r for r in t1 if r["measurementType"].startswith("abundance (count of individuals")]
    assert counts and all(r["measurementTypeID"] == P01 + "OCOUNT01/" and r["measurementUnitID"] == P06 + "UUUU/"
                          for r in counts)
    temperature = [r for r in t1 if r["occurrenceID"] == ""]
    assert temperature and all(r["measurementTypeID"] == P01 + "TEMPPR01/" and r["measurementUnitID"] == P06 + "UPAA/"
                               for r in temperature)
    biomass = [r for r in facts if r["measurementType"] == "biomass"]
    assert biomass and all(r["measurementTypeID"] == "" and r["measurementUnitID"] == P06 + "KGXX/" for r in biomass)
    # a density per km2 has no concept we are sure of: no ID rather than a guess
    per_km2 = [r for r in facts if r["measurementUnit"] == "individuals/km2"]
    assert per_km2 and all(r["measurementTypeID"] == "" and r["measurementUnitID"] == "" for r in per_km2)
    # every ID written is a P01 (type) or P06 (unit) concept URI
    assert all(r["measurementTypeID"] == "" or r["measurementTypeID"].startswith(P01) for r in facts)
    assert all(r["measurementUnitID"] == "" or r["measurementUnitID"].startswith(P06) for r in facts)


def test_vocabulary_file_states_its_vocabularies() -> None:
    from harmonize.export.dwca import vocabulary

    vocab = vocabulary()
    assert "NERC Vocabulary Server" in vocab["description"] and set(vocab["vocabularies"]) == {"P01", "P06"}
    for section, prefix in (("measurementType", P01), ("measurementUnit", P06)):
        for key, entry in vocab[section].items():
            assert entry["id"] is None or (entry["id"].startswith(prefix) and entry["id"].endswith("/")), key
            assert entry["id"] is not None or entry.get("note"), f"{key}: say why there is no ID"


def test_id_encoding_round_trips() -> None:
    import duckdb
    from hypothesis import given, settings
    from hypothesis import strategies as st

    from harmonize.export.dwca import decode_id, encode_id_part, id_part_sql

    con = duckdb.connect()

    @given(st.lists(st.text(min_size=1, max_size=12), min_size=2, max_size=4))
    @settings(max_examples=60, deadline=None)
    def check(parts: list[str]) -> None:
        sql = " || ':' || ".join(id_part_sql("?") for _ in parts)
        got = con.execute(f"SELECT {sql}", parts).fetchall()[0][0]
        assert got == ":".join(encode_id_part(p) for p in parts)
        assert " " not in got and got[0] not in "=+-@\t\r"
        # RFC 3986 percent-decoding of each part gives the parts back (Python's urllib as reference)
        assert [unquote(p) for p in got.split(":")] == parts == decode_id(got)

    check()
    con.close()


def test_an_independent_reader_opens_the_archive(archive: tuple[Path, ExportStore]) -> None:
    """python-dwca-reader (GBIF's general-purpose Darwin Core Archive reader) links core and extensions."""
    from dwca.read import DwCAReader

    with DwCAReader(str(archive[0])) as dwca:
        assert dwca.descriptor.core.type == "http://rs.tdwg.org/dwc/terms/Event"
        core_ids = [row.id for row in dwca]
        assert len(core_ids) == len(set(core_ids)) == 6
        kinds = {ext.type for ext in dwca.descriptor.extensions}
        assert kinds == {"http://rs.tdwg.org/dwc/terms/Occurrence",
                         "http://rs.iobis.org/obis/terms/ExtendedMeasurementOrFact"}
        n_ext = 0
        for row in dwca:
            for ext in row.extensions:
                n_ext += 1
                assert ext.core_id == row.id
        # every extension row belongs to a core row the reader found
        totals = sum(len(dwca.pd_read(ext.file_location)) for ext in dwca.descriptor.extensions)
        assert n_ext == totals > 0


def test_cli_with_effort_and_gpkg_version(archive: tuple[Path, ExportStore], tmp_path: Path) -> None:
    from cli_runner import run_cli

    study_dir = str(archive[0].parent / "study")
    done = run_cli("--study", study_dir, "export", "dwca", str(tmp_path / "e.zip"), "--with-effort")
    assert done.exit_code == 0, done.stderr
    assert "fleet_effort:E1" in {r["eventID"] for r in _tables(tmp_path / "e.zip")["event.txt"]}
    done = run_cli("--study", study_dir, "export", "long", str(tmp_path / "l.csv"), "--with-effort")
    assert done.exit_code == 2 and "--with-effort applies to the dwca format only" in done.stderr
    done = run_cli("--study", study_dir, "export", "gpkg", str(tmp_path / "g.gpkg"), "--gpkg-version", "1.2")
    assert done.exit_code == 0, done.stderr
    done = run_cli("--study", study_dir, "export", "dwca", str(tmp_path / "x.zip"), "--gpkg-version", "1.2")
    assert done.exit_code == 2 and "--gpkg-version applies to the gpkg format only" in done.stderr
