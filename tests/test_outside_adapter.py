"""An adapter from outside the package: found through its entry point, accepted everywhere.

A tiny package (one module, one Table Schema, a dist-info folder with ``entry_points.txt``)
is written into a temporary folder put on ``sys.path``; importlib.metadata finds its
``harmonize.adapters`` entry point as it would an installed distribution's. Then the whole
command line runs on it: check, ingest, status --check, audit and every export format.
"""

from __future__ import annotations

import json
import sys
import textwrap
import zipfile
from collections.abc import Iterator
from pathlib import Path

import duckdb
import pytest
from cli_runner import run_cli

from harmonize.adapters import registry
from harmonize.adapters.base import Adapter
from harmonize.errors import HarmonizeWarning
from harmonize.export import FORMATS

KIND = "seal_colony"
#: A second outside kind, declaring that its rows locate vessels (``Adapter.locates_vessels``).
BOAT_KIND = "boat_seal"
PACKAGE = "keldmar_seal_plugin"

SCHEMA = {
    "name": "seal_colony_rows",
    "fields": [
        {"name": "count_id", "type": "string", "description": "Id of one photographed count.",
         "constraints": {"required": True}},
        {"name": "time", "type": "datetime", "description": "When the photograph was taken.",
         "constraints": {"required": True}},
        {"name": "lat", "type": "number", "unit": "degree_north", "description": "Latitude of the haul-out.",
         "constraints": {"required": True, "minimum": -90, "maximum": 90}},
        {"name": "lon", "type": "number", "unit": "degree_east", "description": "Longitude of the haul-out.",
         "constraints": {"required": True, "minimum": -180, "maximum": 180}},
        {"name": "taxon", "type": "string", "description": "Species counted.", "constraints": {"required": True}},
        {"name": "count", "type": "number", "unit": "1", "description": "Animals counted.",
         "constraints": {"required": True, "minimum": 0}},
    ],
}

MODULE = '''
"""Seals counted on haul-out sites from aerial photographs (an invented outside adapter)."""

import numpy as np
import pandas as pd

from harmonize.adapters.base import Adapter, AdapterOutput, finish
from harmonize.adapters.domain import reject_outside_domain
from harmonize.reading.taxa import resolve_taxa
from harmonize.reading.quarantine import Rejections
from harmonize.errors import ReasonCode


class SealColonyAdapter(Adapter):
    kind = "seal_colony"
    description = "Seals counted on haul-out sites from aerial photographs; no sampling effort."
    tables = {"rows": "keldmar_seal_plugin:seal_colony_rows"}
    display_order = 70

    def read(self, inputs, profile, study, progress=None) -> AdapterOutput:
        rej = Rejections()
        raw, typed = self.read_fields(inputs, profile, rej)
        rows = typed["rows"]
        n = len(rows)
        alive = ~rej.mask("rows", n)
        at = np.flatnonzero(alive)
        reject_outside_domain(study, rows["lon"].to_numpy(float)[at], rows["lat"].to_numpy(float)[at], at,
                              "rows", rej)
        taxon, unknown, messages, _ = resolve_taxa(rows["taxon"], study)
        unknown = unknown & ~rej.mask("rows", n)
        rej.add("rows", np.flatnonzero(unknown), ReasonCode.UNKNOWN_TAXON, messages[unknown])
        ok = ~rej.mask("rows", n)
        k = int(ok.sum())
        events = pd.DataFrame({
            "event_id": rows["count_id"][ok].to_numpy(), "event_start": rows["time"][ok].to_numpy(),
            "event_end": pd.Series(pd.NaT, index=range(k), dtype=rows["time"].dtype),
            "lat": rows["lat"][ok].to_numpy(float), "lon": rows["lon"][ok].to_numpy(float),
            "depth_min_m": 0.0, "depth_max_m": 0.0, "bottom_depth_m": np.nan, "on_bottom": False,
            "effort": np.nan, "effort_unit": None, "flags": [()] * k,
            "source_row": np.flatnonzero(ok) + 1, "observer_id": None,
        })
        values = pd.DataFrame({
            "event_id": rows["count_id"][ok].to_numpy(), "variable": taxon[ok].to_numpy(),
            "variable_kind": "taxon", "life_stage": None, "quantity": "count",
            "value": rows["count"][ok].to_numpy(float), "unit": "1", "zero_filled": False,
            "flags": [()] * k, "source_record_rows": [()] * k, "n_values": 1, "no_effort": True,
        })
        return finish([raw["rows"]], rej, events, values)


class BoatSealAdapter(SealColonyAdapter):
    """The same counts, photographed from fishing vessels: a count locates the vessel."""

    kind = "boat_seal"
    description = "Seals counted from fishing vessels; a count locates the vessel."
    display_order = 69
    grid_values = False
    merges_parts = False
    locates_vessels = True
'''

PROFILE = f'''
[source]
id = "keldmar_seal_survey"
kind = "{KIND}"
provider_type = "agency"

[columns]
count_id = "PHOTO"
time = "TAKEN"
lat = "LAT"
lon = "LON"
taxon = "SPECIES"
count = "N"
'''

# Four photographs: two good, one of an unknown species, one outside the study domain.
ROWS = """PHOTO,TAKEN,LAT,LON,SPECIES,N
P1,2020-06-10T08:00:00Z,43.0,-153.0,Phoca keldmarensis,41
P2,2020-06-11T09:30:00Z,43.5,-151.5,Phoca keldmarensis,17
P3,2020-06-12T10:00:00Z,43.2,-152.0,Phoca nonexistens,5
P4,2020-06-12T11:00:00Z,10.0,20.0,Phoca keldmarensis,3
"""


def _write_plugin(site: Path) -> None:
    package = site / PACKAGE
    package.mkdir(parents=True)
    (package / "__init__.py").write_text(textwrap.dedent(MODULE), encoding="utf-8")
    (package / "seal_colony_rows.schema.json").write_text(json.dumps(SCHEMA), encoding="utf-8")
    dist = site / f"{PACKAGE}-0.1.dist-info"
    dist.mkdir()
    (dist / "METADATA").write_text(f"Metadata-Version: 2.1\nName: {PACKAGE}\nVersion: 0.1\n", encoding="utf-8")
    (dist / "entry_points.txt").write_text(
        f"[{registry.ENTRY_POINT_GROUP}]\n{KIND} = {PACKAGE}:SealColonyAdapter\n"
        f"{BOAT_KIND} = {PACKAGE}:BoatSealAdapter\n", encoding="utf-8")


def _forget_plugin() -> None:
    registry._REGISTRY.pop(KIND, None)
    registry._REGISTRY.pop(BOAT_KIND, None)
    registry._load_all.cache_clear()
    for name in [m for m in sys.modules if m == PACKAGE or m.startswith(PACKAGE + ".")]:
        del sys.modules[name]


@pytest.fixture
def plugin(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Iterator[None]:
    """The outside package on sys.path, its entry point visible to importlib.metadata."""
    site = tmp_path / "site"
    _write_plugin(site)
    _forget_plugin()
    monkeypatch.syspath_prepend(str(site))
    yield
    monkeypatch.undo()
    _forget_plugin()


@pytest.fixture
def seal_study(study_dir: Path) -> Path:
    with (study_dir / "taxa.csv").open("a", encoding="utf-8") as fh:
        fh.write("Phoca keldmarensis,mammal,,false\n")
    (study_dir / "profiles" / "seals.toml").write_text(PROFILE, encoding="utf-8")
    (study_dir / "seals.csv").write_text(ROWS, encoding="utf-8")
    return study_dir


def test_the_entry_point_adapter_is_listed_with_its_traits(plugin: None) -> None:
    adapters = registry.list_adapters()
    assert adapters[KIND].__module__ == PACKAGE
    assert KIND in registry.kinds()
    assert registry.kinds()[-1] == KIND  # display_order 70: after the six built-in kinds (10..60)
    assert KIND in registry.kinds(is_sample=True) and KIND in registry.kinds(row_traced=True)
    assert KIND not in registry.kinds(finds_twins=True)
    # what the rest of the tool selects by: the outside kinds' declared attributes
    assert registry.kinds(locates_vessels=True) == ("effort", BOAT_KIND)
    assert registry.kinds(grid_values=True) == ("gridded",)
    assert KIND not in registry.kinds(merges_parts=True) and BOAT_KIND not in registry.kinds(merges_parts=True)
    assert registry.kinds_sql("o.source_kind", locates_vessels=True) == f"o.source_kind IN ('effort', '{BOAT_KIND}')"
    assert registry.kinds_sql(negate=True, grid_values=True) == "source_kind NOT IN ('gridded')"
    # a trait no kind has selects nothing (and its negation everything)
    assert registry.kinds_sql(grid_values=True, locates_vessels=True) == "FALSE"
    assert registry.kinds_sql(negate=True, grid_values=True, locates_vessels=True) == "TRUE"


def test_an_outside_kind_that_locates_vessels_is_withheld_under_the_rule_of_three(
        plugin: None, seal_study: Path, tmp_path: Path) -> None:
    # the disclosure rule follows the declared attribute, not a list of kind names: the boat
    # counts carry no vessel count, so every one falls under the rule of three and no export
    # or listing shows them (docs/privacy.md); the same counts as seal_colony rows are shown
    boats = seal_study / "profiles" / "boats.toml"
    boats.write_text(PROFILE.replace(f'kind = "{KIND}"', f'kind = "{BOAT_KIND}"')
                     .replace('id = "keldmar_seal_survey"', 'id = "keldmar_seal_boats"'), encoding="utf-8")
    study = ["--study", str(seal_study)]
    for profile in ("seals", "boats"):
        out = run_cli(*study, "ingest", profile, str(seal_study / "seals.csv"))
        assert out.exit_code in (0, 1), out.stderr
    target = tmp_path / "long.csv"
    out = run_cli(*study, "export", "long", str(target))
    assert out.exit_code == 0, out.stderr
    text = target.read_text()
    assert "keldmar_seal_survey" in text and "keldmar_seal_boats" not in text
    listing = run_cli(*study, "quarantine")
    assert listing.exit_code == 0, listing.stderr
    # the boat source's rejected rows keep file and row, their text is withheld
    assert listing.stdout.count("Phoca nonexistens") == 1


def test_without_the_plugin_the_kind_is_refused_naming_the_installed_ones(seal_study: Path) -> None:
    _forget_plugin()
    out = run_cli("--study", str(seal_study), "check", "seals", str(seal_study / "seals.csv"))
    assert out.exit_code == 2
    assert f"'{KIND}' is not a source kind; expected one of trawl, plankton" in out.stderr


def test_check_ingest_status_audit_and_every_export(plugin: None, seal_study: Path, tmp_path: Path) -> None:
    study = ["--study", str(seal_study)]
    seals = str(seal_study / "seals.csv")
    check = run_cli(*study, "check", "seals", seals)
    assert check.exit_code == 1, check.stderr  # rows were quarantined: data problems found
    assert "unknown_taxon" in check.stdout and "outside_domain" in check.stdout

    ingest = run_cli(*study, "ingest", "seals", seals)
    assert ingest.exit_code in (0, 1), ingest.stderr
    with duckdb.connect(str(seal_study / "store" / "harmonized.duckdb"), read_only=True) as con:
        (read, accepted, quarantined), = con.execute(
            "SELECT rows_read, rows_accepted, rows_quarantined FROM ingests WHERE source_kind = ?", [KIND]).fetchall()
        # counted by hand from ROWS: four photographs, P3 (unknown species) and P4 (10 N 20 E,
        # far outside the Keldmar Sea) quarantined
        assert (read, accepted, quarantined) == (4, 2, 2)
        reasons = dict(con.execute("SELECT source_row, reason_code FROM quarantine ORDER BY 1").fetchall())
        assert reasons == {3: "unknown_taxon", 4: "outside_domain"}

    status = run_cli(*study, "status", "--check")
    assert status.exit_code == 0, status.stdout + status.stderr

    audit_json = tmp_path / "audit.json"
    audit = run_cli(*study, "audit", "--json", str(audit_json), "--html", str(tmp_path / "audit.html"))
    assert audit.exit_code == 0, audit.stderr
    extent = json.loads(audit_json.read_text())["extent"]
    assert any(e["source_kind"] == KIND and e["events"] == 2 for e in extent)
    assert KIND in (tmp_path / "audit.html").read_text()

    suffix = {"long": ".csv", "wide": ".csv", "grid": ".csv", "gpkg": ".gpkg", "dwca": ".zip"}
    assert set(suffix) == set(FORMATS)
    for fmt in FORMATS:
        target = tmp_path / f"seals_{fmt}{suffix[fmt]}"
        out = run_cli(*study, "export", fmt, str(target), "--kind", KIND)
        assert out.exit_code == 0, (fmt, out.stderr)
        assert target.is_file(), fmt
    assert "Phoca keldmarensis" in (tmp_path / "seals_long.csv").read_text()
    assert "Phoca keldmarensis" in (tmp_path / "seals_wide.csv").read_text()
    with zipfile.ZipFile(tmp_path / "seals_dwca.zip") as z:
        lines = z.read("occurrence.txt").decode().splitlines()
    occurrences = [dict(zip(lines[0].split("\t"), line.split("\t"), strict=True)) for line in lines[1:]]
    assert sorted((o["scientificName"], o["individualCount"]) for o in occurrences) == [
        ("Phoca keldmarensis", "17"), ("Phoca keldmarensis", "41")]


def test_a_second_class_for_a_registered_kind_warns() -> None:
    first = registry.adapter_class("trawl")

    class OtherTrawl(Adapter):
        kind = "trawl"
        description = "a look-alike"
        tables = first.tables

        def read(self, inputs, profile, study, progress=None):  # type: ignore[override]
            raise NotImplementedError

    try:
        with pytest.warns(HarmonizeWarning, match="replaces harmonize.adapters.trawl.TrawlAdapter for source kind 'trawl'"):
            registry.register(OtherTrawl)
        assert registry.adapter_class("trawl") is OtherTrawl
    finally:
        registry._REGISTRY["trawl"] = first
    registry.register(first)  # the same class again: no warning (an error under the suite's filter)
