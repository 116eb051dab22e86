"""Fuzzing the container inputs: damaged NetCDF files and Darwin Core Archives.

A NetCDF file is truncated or has bytes overwritten (a copy that stopped, a bad disk
sector); a Darwin Core Archive has one member broken with the CSV mutations of
tests/fuzzing.py, its meta.xml edited, or the zip bytes damaged. The property is the one of
test_fuzz_adapters.py: a one-line refusal naming the file, or every value accounted for
(for grids, rows are grid values; masked values are counted in bulk).
"""

from __future__ import annotations

import io
import shutil
import zipfile
from pathlib import Path

import numpy as np
import pytest
from fuzzing import Mutation, check_outcome, mutate_all, mutations
from gridded_files import regular_file, write_profile
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from harmonize.study import Study, load_study

pytestmark = pytest.mark.slow

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
DWCA = FIXTURES / "opportunistic" / "dwca_checklists"
_SETTINGS = settings(suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])


@pytest.fixture(scope="module")
def files_study(tmp_path_factory: pytest.TempPathFactory) -> Study:
    root = tmp_path_factory.mktemp("fuzz_files") / "study"
    shutil.copytree(FIXTURES / "keldmar", root)
    write_profile(root, "sst_fuzz", 'sst = "sea_surface_temperature"')
    lat = np.linspace(42.1, 44.9, 6)
    lon = np.linspace(-153.9, -150.1, 8)
    celsius = np.round(np.random.default_rng(0).uniform(5.0, 15.0, (3, 6, 8)), 2)
    celsius[0, 0, 0] = np.nan
    regular_file(root / "sst_good.nc", {"sst": (celsius, {"units": "degC"})}, lat, lon, np.array([0.0, 31.0, 59.0]))
    return load_study(root)


def _damage(data: bytes, how: str, at: int, size: int, fill: bytes) -> bytes:
    at %= len(data)
    if how == "truncate":
        return data[:at]
    out = bytearray(data)
    patch = (fill * (size // max(len(fill), 1) + 1))[:size] if fill else bytes(size)
    out[at:at + size] = patch[:len(out) - at]
    return bytes(out)


_DAMAGE = st.tuples(st.sampled_from(["truncate", "overwrite"]), st.integers(0, 10**6), st.integers(1, 512),
                    st.binary(min_size=0, max_size=16))


@_SETTINGS
@given(damage=st.lists(_DAMAGE, min_size=1, max_size=3))
def test_damaged_netcdf_is_refused_or_every_value_accounted(files_study: Study,
                                                            damage: list[tuple[str, int, int, bytes]]) -> None:
    data = (files_study.root / "sst_good.nc").read_bytes()
    for how, at, size, fill in damage:
        if data:
            data = _damage(data, how, at, size, fill)
    path = files_study.root / "sst.nc"
    path.write_bytes(data)
    outcome = check_outcome(files_study, "sst_fuzz", {"rows": path})
    if outcome.result is not None:
        assert sum(f.rows_read for f in outcome.result.files) <= 3 * 6 * 8


def _archive(members: dict[str, bytes]) -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as zf:
        for name, data in members.items():
            zf.writestr(name, data)
    return buf.getvalue()


_META_EDITS = st.sampled_from([
    ('index="2"', 'index="99"'), ('ignoreHeaderLines="1"', 'ignoreHeaderLines="0"'),
    ('ignoreHeaderLines="1"', 'ignoreHeaderLines="-3"'), ('fieldsTerminatedBy="\\t"', 'fieldsTerminatedBy=","'),
    ('<coreid index="0"/>', ""), ('<id index="0"/>', ""), ("event.txt", "occurrence.txt"),
    ("http://rs.tdwg.org/dwc/terms/Event", "http://rs.tdwg.org/dwc/terms/Taxon"),
    ('encoding="UTF-8"', 'encoding="UTF-16"'), ("</archive>", ""), ('term="http://rs.tdwg.org/dwc/terms/eventDate"',
                                                                     'term="http://rs.tdwg.org/dwc/terms/eventID"'),
])


@_SETTINGS
@given(member=st.sampled_from(["event.txt", "occurrence.txt", "meta.xml", "zip"]),
       ms=st.lists(mutations(), min_size=1, max_size=3), edit=_META_EDITS, damage=_DAMAGE)
def test_damaged_darwin_core_archive_is_refused_or_every_row_accounted(
    files_study: Study, member: str, ms: list[Mutation], edit: tuple[str, str], damage: tuple[str, int, int, bytes]
) -> None:
    members = {name: (DWCA / name).read_bytes() for name in ("meta.xml", "event.txt", "occurrence.txt")}
    if member == "meta.xml":
        members["meta.xml"] = members["meta.xml"].replace(edit[0].encode(), edit[1].encode())
    elif member != "zip":
        members[member] = mutate_all(members[member], ms)
    data = _archive(members)
    if member == "zip":
        data = _damage(data, *damage)
    path = files_study.root / "portal.zip"
    path.write_bytes(data)
    check_outcome(files_study, "opportunistic_dwc", {"rows": path})
