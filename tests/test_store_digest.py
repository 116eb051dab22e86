"""The store's content does not change unless a change means it to: digests of the demo and of benchmark inputs.

Performance work (issue 23) rewrites how rows are made and written; these tests hold the
values of the rows to digests recorded before that work (see ``tests/store_content.py``
for what a digest covers and why doubles enter it at 8 significant digits).

To renew a digest deliberately, when a change is meant to alter store values (a new column,
a corrected rule): run

    HARMONIZE_PRINT_DIGESTS=1 .venv/bin/python -m pytest -q -s tests/test_store_digest.py

check that the columns named as changed are exactly
those the change should alter, paste the printed dictionary over the recorded one and say
in the commit message which columns changed and why.
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path
from types import SimpleNamespace
from unittest import mock

import numpy as np
import pytest
from store_content import differences, store_digests

import harmonize.privacy as privacy
from harmonize import load_study
from harmonize.ingest import run

#: The studies' pseudonym salt, fixed so that pseudonyms (and the ids made from them) repeat;
#: a real study gets a random one (harmonize.privacy.study_salt).
SALT = "5a17" * 8

# Inputs of the benchmarks at a small size: the generators must keep making the same files,
# or the benchmark figures of BENCHMARKS.md would not compare like with like.
PINGS_N = 20_000
TRAWL_N = 20_000
GRID_STEPS, GRID_NY, GRID_NX = 40, 48, 64

#: sha256 of the benchmark generators' files at the sizes above.
RECORDED_INPUTS = {
    "gridded.rows": "8ddcf8725a1fd6919a8ea93b6aaf4df5a754400bfcd08c292c0763e6980817df",
    "pings.rows": "1c9141973adb380b4e8cc48d1dfc81093dd055c0dc364d8ab56341c30672554f",
    "trawl.events": "4f23baa72821e94b732044f84d42c2249c05301a55e1252f676445a40c26535d",
    "trawl.records": "5eeb0fb15d5ec0aaed9a994efb570810cb8dbf5f2dd2d09c11aee34887ba5e5e"
}

#: Digests of the store after ingesting each benchmark input (commit of this test, before issue 23's changes).
RECORDED_BENCH_STORES: dict[str, dict[str, dict[str, str]]] = {
    "gridded": {
        "ingests": {
            "*": "426d81bd8a9082a4",
            "file_name": "3817f63c1ef94e4a",
            "records_written": "78cbb2cc25622d53",
            "records_zero_filled": "0b1d31977c702a42",
            "rows": "1",
            "rows_accepted": "32392be4be770662",
            "rows_quarantined": "ab3f052a5023abae",
            "rows_read": "db4c3bebb73add4e",
            "source_id": "84db62125b01e6a8",
            "source_kind": "4861798a89e4cb10",
            "status": "cc54f9aeb2378282"
        },
        "observations": {
            "*": "1b21e5f58f2eb9c7",
            "behavior": "5ec41ebf1cc79960",
            "bottom_depth_m": "5ec41ebf1cc79960",
            "cell_id": "74d0529afa34a254",
            "count_observed": "5ec41ebf1cc79960",
            "density": "5ec41ebf1cc79960",
            "density_unit": "5ec41ebf1cc79960",
            "depth_layer": "89f0208dc1039d79",
            "depth_max_m": "5ec41ebf1cc79960",
            "depth_min_m": "5ec41ebf1cc79960",
            "effort": "a11944c5eeac1db7",
            "effort_unit": "9a49965545c071a4",
            "event_end": "24525f61f6ce77e3",
            "event_id": "6a299f5a9d5e82d6",
            "event_start": "776ed1018a997e9f",
            "flags": "3f9432f23734e577",
            "gear": "5ec41ebf1cc79960",
            "lat": "c5b31459e8d6b5d0",
            "life_stage": "5ec41ebf1cc79960",
            "lon": "32bf57a5f8a6db00",
            "n_values": "fa909f749711168c",
            "n_vessels": "5ec41ebf1cc79960",
            "observer_id": "5ec41ebf1cc79960",
            "protocol": "5ec41ebf1cc79960",
            "provider_record_id": "5ec41ebf1cc79960",
            "provider_type": "bc44e7fa73a75cf5",
            "quantity": "87c8bef4a6314c1e",
            "record_id": "a1cb132ea2af109f",
            "rows": "1713",
            "season": "4c65243e52635192",
            "season_year": "12042ec27bd42416",
            "source_file": "a3fb9a882d74dcb6",
            "source_id": "43cc21a16a7e5f7c",
            "source_kind": "06286cd412cb57c6",
            "source_record_rows": "3f9432f23734e577",
            "source_row": "5ec41ebf1cc79960",
            "stratum": "c1c41bdb3d2d779c",
            "subsample_fraction": "5ec41ebf1cc79960",
            "track_end_lat": "5ec41ebf1cc79960",
            "track_end_lon": "5ec41ebf1cc79960",
            "track_start_lat": "5ec41ebf1cc79960",
            "track_start_lon": "5ec41ebf1cc79960",
            "unit": "341baf1ef1d52365",
            "value": "d38c9d4cee05b8dd",
            "variable": "7233148bd3c91fed",
            "variable_kind": "5200aaf9c6be2e84",
            "year": "12042ec27bd42416",
            "zero_filled": "ea1487abb1f83fd9"
        },
        "quarantine": {
            "*": "6d9e9bf79fe6aad0",
            "message": "e3b0c44298fc1c14",
            "raw": "e3b0c44298fc1c14",
            "reason_code": "e3b0c44298fc1c14",
            "rows": "0",
            "source_file": "e3b0c44298fc1c14",
            "source_row": "e3b0c44298fc1c14"
        }
    },
    "pings": {
        "ingests": {
            "*": "2f72602bb8feb85c",
            "file_name": "0539ff6340adbce1",
            "records_written": "467164daadce22d2",
            "records_zero_filled": "0b1d31977c702a42",
            "rows": "1",
            "rows_accepted": "df85e8eda5fd1988",
            "rows_quarantined": "0b1d31977c702a42",
            "rows_read": "df85e8eda5fd1988",
            "source_id": "c4fdec8b1eb00507",
            "source_kind": "21c654c2b4d74fc7",
            "status": "cc54f9aeb2378282"
        },
        "observations": {
            "*": "24d02c8b95c53b6a",
            "behavior": "98c7a27d6401d1a3",
            "bottom_depth_m": "98c7a27d6401d1a3",
            "cell_id": "deb0d51a5d468c11",
            "count_observed": "98c7a27d6401d1a3",
            "density": "98c7a27d6401d1a3",
            "density_unit": "98c7a27d6401d1a3",
            "depth_layer": "e3b65cc2c7aba8c6",
            "depth_max_m": "98c7a27d6401d1a3",
            "depth_min_m": "98c7a27d6401d1a3",
            "effort": "51446656d89f81d6",
            "effort_unit": "4619060b83f1f8e0",
            "event_end": "dc742a23379baf92",
            "event_id": "fd701149007e64b4",
            "event_start": "84ad6f0ce5ab33a3",
            "flags": "264131ddecce3ff4",
            "gear": "6d736bc907885281",
            "lat": "f9fb64559bcd0b77",
            "life_stage": "98c7a27d6401d1a3",
            "lon": "e8f1d9ff25d2016d",
            "n_values": "3ed8179bf6612add",
            "n_vessels": "22ff2a16578edc6a",
            "observer_id": "98c7a27d6401d1a3",
            "protocol": "98c7a27d6401d1a3",
            "provider_record_id": "98c7a27d6401d1a3",
            "provider_type": "ec8a435482286829",
            "quantity": "85e167796a2bbcaf",
            "record_id": "08dc3f1427548b89",
            "rows": "599",
            "season": "891a38fdf1d7325f",
            "season_year": "a72a5f2c1697a657",
            "source_file": "27e69e11db8c233d",
            "source_id": "a205510e896e1a03",
            "source_kind": "a08cefcf1fe4a0a2",
            "source_record_rows": "264131ddecce3ff4",
            "source_row": "98c7a27d6401d1a3",
            "stratum": "3fe258652b442248",
            "subsample_fraction": "98c7a27d6401d1a3",
            "track_end_lat": "98c7a27d6401d1a3",
            "track_end_lon": "98c7a27d6401d1a3",
            "track_start_lat": "98c7a27d6401d1a3",
            "track_start_lon": "98c7a27d6401d1a3",
            "unit": "4619060b83f1f8e0",
            "value": "51446656d89f81d6",
            "variable": "eb9f5aa7f0bf4a5f",
            "variable_kind": "a08cefcf1fe4a0a2",
            "year": "2dd678c0a571fd82",
            "zero_filled": "7e901901bea2cc28"
        },
        "quarantine": {
            "*": "6d9e9bf79fe6aad0",
            "message": "e3b0c44298fc1c14",
            "raw": "e3b0c44298fc1c14",
            "reason_code": "e3b0c44298fc1c14",
            "rows": "0",
            "source_file": "e3b0c44298fc1c14",
            "source_row": "e3b0c44298fc1c14"
        }
    },
    "trawl": {
        "ingests": {
            "*": "34fb59fd32697454",
            "file_name": "7c72cf88a58f37b4",
            "records_written": "2e92cc28453b3361",
            "records_zero_filled": "31c96fd622d8637c",
            "rows": "1",
            "rows_accepted": "7a06e0518773c9bd",
            "rows_quarantined": "fce7ba024607744e",
            "rows_read": "a488fe21b0156dc3",
            "source_id": "cfc1df79cf4fd455",
            "source_kind": "43b6f6618d50b41d",
            "status": "cc54f9aeb2378282"
        },
        "observations": {
            "*": "c1ae25aa390ca2d1",
            "behavior": "2bed5c47ac451461",
            "bottom_depth_m": "fa6d965530428668",
            "cell_id": "1f31ebc6de06c151",
            "count_observed": "2bed5c47ac451461",
            "density": "b1f24414a204a425",
            "density_unit": "b21d4fc29e39c514",
            "depth_layer": "e5335a4c7ea1375a",
            "depth_max_m": "fa6d965530428668",
            "depth_min_m": "fa6d965530428668",
            "effort": "6b0b74fdf2e3dfd0",
            "effort_unit": "97d0d01d56880f77",
            "event_end": "1f096889b95c2090",
            "event_id": "d433a94fba0939ee",
            "event_start": "5ca15afd5ea329af",
            "flags": "021ec4dda9c95943",
            "gear": "2bed5c47ac451461",
            "lat": "b95eb0b060904cc4",
            "life_stage": "ad317449f2d2fd83",
            "lon": "4d2d2770be29280f",
            "n_values": "55fe90dd05cb310e",
            "n_vessels": "2bed5c47ac451461",
            "observer_id": "2bed5c47ac451461",
            "protocol": "83ce37c40e3d24a1",
            "provider_record_id": "2bed5c47ac451461",
            "provider_type": "94d6f69115b5bb16",
            "quantity": "bdd15dde9de737ec",
            "record_id": "3ea2f47861f916f8",
            "rows": "50804",
            "season": "ef8c3f852bf822f4",
            "season_year": "fd7313fd1e90ee7a",
            "source_file": "7ef040411f627176",
            "source_id": "e7fbed22c1bfb953",
            "source_kind": "9849cbcd57dccd5d",
            "source_record_rows": "2f8bc66af75b1a95",
            "source_row": "a2dd0743108c7834",
            "stratum": "eb2323cdb2936593",
            "subsample_fraction": "2bed5c47ac451461",
            "track_end_lat": "491faeb6c68800a9",
            "track_end_lon": "12aefc367a137fde",
            "track_start_lat": "01390833631bb836",
            "track_start_lon": "e5224a562d9131ee",
            "unit": "4360ac5bf1ac2077",
            "value": "63ccbc4cec9aab08",
            "variable": "e3f0462ab3909b57",
            "variable_kind": "878edeacb34c1091",
            "year": "fd7313fd1e90ee7a",
            "zero_filled": "ed6f6b2f502a7269"
        },
        "quarantine": {
            "*": "6eef1cc74f195265",
            "message": "4ca3e7370efef0d0",
            "raw": "a9fac9e8f30dacc9",
            "reason_code": "11a9ecd658b0f36c",
            "rows": "79",
            "source_file": "8253c722dfcc3d90",
            "source_row": "73b529a34039ad90"
        }
    }
}

#: Digests of the demo's store (every source kind, the late files and the corrected delivery).
RECORDED_DEMO: dict[str, dict[str, str]] = {
    "ingests": {
        "*": "5ea110e149c8bfa7",
        "file_name": "111fc93b51bd065a",
        "records_written": "2fd93c9451e6107a",
        "records_zero_filled": "f059cdae718b8337",
        "rows": "19",
        "rows_accepted": "94778e0fccbfa2b9",
        "rows_quarantined": "8305e8e986e7781b",
        "rows_read": "6a5f85dbc51db4bc",
        "source_id": "67816c7eec4a48b1",
        "source_kind": "e278e7a2f1af0ef2",
        "status": "75b16f855150f33e"
    },
    "observations": {
        "*": "7717ae90325dbfa0",
        "behavior": "b37cd00fb839673c",
        "bottom_depth_m": "342f95348080ee76",
        "cell_id": "752bd8be4032d619",
        "count_observed": "4ae5225c2fd2a37e",
        "density": "ee62481c1e2d0ffa",
        "density_unit": "9a79bb8200ca1d81",
        "depth_layer": "b8a58acf1bc1ca5c",
        "depth_max_m": "5f2cc63a2fae697b",
        "depth_min_m": "41e4bb49de39df50",
        "effort": "ab829a13ac739bc5",
        "effort_unit": "a7e7851134a5279d",
        "event_end": "af30e2139b4e5a8d",
        "event_id": "9aa07dc4c36d5899",
        "event_start": "c170e97d2ffcbc1c",
        "flags": "dfb77a353b86ecef",
        "gear": "dfc338ecfd7d221d",
        "lat": "aaba3516a67d097e",
        "life_stage": "53af2375798aef8c",
        "lon": "3ec6680f923e7851",
        "n_values": "b0459de2f4572bb0",
        "n_vessels": "dfc86bf131be4180",
        "observer_id": "1612b7f19f0c35db",
        "protocol": "62c52c8e4f4193d5",
        "provider_record_id": "332538910834d894",
        "provider_type": "c1536fb3dbad5935",
        "quantity": "ee922bc824f144d0",
        "record_id": "dbcb7bd17ad1b593",
        "rows": "107791",
        "season": "756aa459457f844a",
        "season_year": "12ded92e2b055664",
        "source_file": "deae911fa5003edc",
        "source_id": "289d470747b04dda",
        "source_kind": "6f270afadbc0d371",
        "source_record_rows": "93a517dba0cb9be3",
        "source_row": "fc6e2c11b604fe35",
        "stratum": "e298c7a3210abfbe",
        "subsample_fraction": "6a172ffe374391e8",
        "track_end_lat": "635938914d7a0218",
        "track_end_lon": "81cd2b5287a23a31",
        "track_start_lat": "7d97d66635caef77",
        "track_start_lon": "2e73b461ad39ce92",
        "unit": "d40aab27cd536140",
        "value": "8e9f1642e749903f",
        "variable": "d8e14c9486f4d8ab",
        "variable_kind": "2222c05aa815a6db",
        "year": "1dae67367257b09e",
        "zero_filled": "f4f2000e4fd1ad51"
    },
    "quarantine": {
        "*": "011a8a0ae74c90f1",
        "message": "3e6e28d9f18f880d",
        "raw": "5599ae4b8ef7b86f",
        "reason_code": "995817bd0955ed2f",
        "rows": "169",
        "source_file": "26e070c7f9be97ed",
        "source_row": "7160c14e43df29bc"
    }
}

#: None of these inputs has an accepted event without values: the digest of that table
#: when empty (recorded at commit a86fdcf, before the events without values were read from
#: the rows made instead of from the adapter).
EMPTY_EVENTS_WITHOUT_VALUES = {"*": "acf2943ff4d48d4a", "rows": "0", **{c: "e3b0c44298fc1c14" for c in (
    "bottom_depth_m", "cell_id", "depth_layer", "depth_max_m", "depth_min_m", "effort", "effort_unit", "event_end",
    "event_id", "event_start", "flags", "lat", "lon", "observer_id", "protocol", "provider_type", "season",
    "season_year", "source_file", "source_id", "source_kind", "source_row", "stratum", "year")}}
for _recorded in (*RECORDED_BENCH_STORES.values(), RECORDED_DEMO):
    _recorded["events_without_values"] = EMPTY_EVENTS_WITHOUT_VALUES


def _check(found: dict, recorded: dict, what: str) -> None:
    if os.environ.get("HARMONIZE_PRINT_DIGESTS"):
        print(f"\n{what} =", json.dumps(found, indent=4, sort_keys=True))
    changed = differences(found, recorded)
    assert not changed, (f"{what}: the store's content changed in {', '.join(changed)}; if that is meant, renew "
                         "the recorded digest as the module docstring says")


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        while chunk := f.read(1 << 20):
            h.update(chunk)
    return h.hexdigest()


def _grid_digest(path: Path) -> str:
    """The packed values, time axis and coordinates of a NetCDF file (its bytes carry HDF5 metadata)."""
    import netCDF4

    h = hashlib.sha256()
    with netCDF4.Dataset(path) as nc:
        for name in ("time", "lat", "lon", "analysed_sst"):
            var = nc.variables[name]
            var.set_auto_maskandscale(False)
            h.update(np.ascontiguousarray(var[:]).tobytes())
    return h.hexdigest()


@pytest.fixture(scope="module")
def bench_inputs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, tuple[Path, dict[str, Path], str]]:
    """Small benchmark inputs, each in its own study: (study folder, inputs, profile)."""
    from benchmarks.gridded_memory import PROFILE, write_file
    from benchmarks.synth import ping_study, trawl_study
    from harmonize.demo.sea import write_study

    base = tmp_path_factory.mktemp("bench")
    pings = ping_study(base / "pings", PINGS_N)
    events, records = trawl_study(base / "trawl", TRAWL_N)
    grid_dir = base / "gridded"
    write_study(grid_dir)
    (grid_dir / "profiles" / "bench_sst.toml").write_text(PROFILE.format(chunk_mb=1), encoding="utf-8")
    nc = grid_dir / "sst.nc"
    write_file(nc, GRID_STEPS, GRID_NY, GRID_NX, block=7)
    for folder in (base / "pings", base / "trawl", grid_dir):
        (folder / privacy.SALT_FILE).write_text(SALT, encoding="utf-8")
    return {"pings": (base / "pings", {"rows": pings}, "bench_pings"),
            "trawl": (base / "trawl", {"events": events, "records": records}, "bench_trawl"),
            "gridded": (grid_dir, {"rows": nc}, "bench_sst")}


@pytest.mark.slow   # the benchmark inputs at 20,000 rows each: run by make test, or name the file
def test_benchmark_generators_make_the_same_files(bench_inputs) -> None:  # type: ignore[no-untyped-def]
    found = {}
    for what, (_, inputs, _) in bench_inputs.items():
        for role, path in inputs.items():
            found[f"{what}.{role}"] = _grid_digest(path) if path.suffix == ".nc" else _sha256(path)
    if os.environ.get("HARMONIZE_PRINT_DIGESTS"):
        print("\nRECORDED_INPUTS =", json.dumps(found, indent=4, sort_keys=True))
    assert found == RECORDED_INPUTS


@pytest.mark.slow   # stores of the 20,000-row benchmark inputs
@pytest.mark.parametrize("what", ["pings", "trawl", "gridded"])
def test_benchmark_input_store_content(bench_inputs, what: str) -> None:  # type: ignore[no-untyped-def]
    folder, inputs, profile = bench_inputs[what]
    result = run(load_study(folder), profile, inputs)
    assert result.rows_read == result.rows_accepted + result.rows_quarantined
    _check(store_digests(folder), RECORDED_BENCH_STORES.get(what, {}), f"RECORDED_BENCH_STORES[{what!r}]")


@pytest.fixture(scope="module")
def demo_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo's ingests alone (every source kind, late files, the corrected re-delivery).

    The audits and exports of ``build_demo`` read the store and do not change it; they are
    left out to keep this test near half a minute.
    """
    import harmonize.demo.build as build

    folder = tmp_path_factory.mktemp("digest") / "demo-study"
    with mock.patch.object(build, "_audit_before", lambda *a, **k: None), \
            mock.patch.object(build, "_run_optional", lambda *a, **k: None), \
            mock.patch.object(privacy, "secrets", SimpleNamespace(token_hex=lambda n: SALT)):
        run_ = build.build_demo(folder)
    assert {item.profile.split("/")[-1] for item, _ in run_.ingests}  # it ingested something
    return folder


@pytest.mark.slow
def test_demo_store_content(demo_store: Path) -> None:
    from harmonize import Store
    from harmonize.demo.build import DEMO_KINDS

    found = store_digests(demo_store)
    with Store(load_study(demo_store).store_dir).connect() as con:
        kinds = {k for (k,) in con.sql("SELECT DISTINCT source_kind FROM observations").fetchall()}
    # every kind the demo generates is in the store, so the digest covers it
    assert set(DEMO_KINDS) <= kinds
    _check(found, RECORDED_DEMO, "RECORDED_DEMO")
