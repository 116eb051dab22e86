"""The one unit registry (harmonize.units): checked against pint's own registry and against
published definitions, for profile spellings and CF (UDUNITS) spellings; bad units named."""

from __future__ import annotations

import numpy as np
import pint
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from harmonize import units

# A plain pint registry as the independent reference (its fathom is the US survey one, so the
# fathom and nautical mile are checked against NIST below instead).
UREG = pint.UnitRegistry()


# ---------------------------------------------------------------- published definitions
def test_fathom_nautical_mile_knot_are_the_international_definitions() -> None:
    # NIST SP 811 (2008 ed.), Appendix B.8: foot = 0.3048 m (exact), nautical mile = 1852 m
    # (exact), knot = 1852/3600 m/s, pound (avoirdupois) = 0.45359237 kg (exact); the
    # international fathom = 6 international feet = 1.8288 m (International Yard and Pound
    # Agreement 1959).
    assert units.to_canonical(np.array([1.0]), "length", "fathom")[0] == 1.8288
    assert units.to_canonical(np.array([1.0]), "length", "fathoms")[0] == 1.8288
    assert units.to_canonical(np.array([1.0]), "length", "fm")[0] == 1.8288
    assert units.to_canonical(np.array([1.0]), "length", "feet")[0] == 0.3048
    assert units.to_canonical(np.array([1.0]), "distance", "nmi")[0] == 1.852
    assert units.to_canonical(np.array([1.0]), "distance", "NM")[0] == 1.852
    assert units.to_canonical(np.array([1.0]), "distance", "nautical_mile")[0] == 1.852
    assert units.to_canonical(np.array([1.0]), "mass", "lb")[0] == 0.45359237
    # knot -> m/s, and a speed in m/s back to knots: 1 m/s = 3600/1852 kn
    assert units.to_canonical(np.array([1.0]), "speed", "m/s")[0] == pytest.approx(3600 / 1852, rel=1e-14)
    # pint's own "fathom" is 6 US survey feet (1200/3937 m each): ours must differ from it
    assert UREG.Quantity(1, "fathom").to("m").magnitude == pytest.approx(6 * 1200 / 3937, rel=1e-15)
    assert units.conversion("length", "fathom")[0] != UREG.Quantity(1, "fathom").to("m").magnitude


def test_temperature_offsets_are_the_si_definition() -> None:
    # BIPM SI Brochure (9th ed., 2019), section 2.3.1: t/degC = T/K - 273.15; degF: t/degC =
    # (t/degF - 32) * 5/9 (NIST SP 811 (2008), B.9).
    assert units.conversion("temperature", "K") == (1.0, -273.15)
    assert units.to_canonical(np.array([32.0, 212.0]), "temperature", "degF") == pytest.approx([0.0, 100.0], abs=1e-9)


# ---------------------------------------------------------------- profile spellings vs pint
@pytest.mark.parametrize(
    ("dimension", "unit", "pint_unit", "canonical"),
    [
        ("mass", "grams", "gram", "kg"),
        ("mass", "g", "gram", "kg"),
        ("mass", "tonnes", "metric_ton", "kg"),
        ("mass", "t", "metric_ton", "kg"),
        ("mass", "mg", "milligram", "kg"),
        ("duration", "hours", "hour", "hour"),
        ("duration", "hr", "hour", "hour"),
        ("duration", "min", "minute", "hour"),
        ("duration", "minutes", "minute", "hour"),
        ("duration", "s", "second", "hour"),
        ("duration", "d", "day", "hour"),
        ("length", "feet", "foot", "m"),
        ("length", "ft", "foot", "m"),
        ("length", "cm", "centimeter", "m"),
        ("length", "yd", "yard", "m"),
        ("distance", "m", "meter", "km"),
        ("distance", "mi", "mile", "km"),
        ("distance", "kilometres", "kilometer", "km"),
        ("speed", "knots", "knot", "knot"),
        ("speed", "kt", "knot", "knot"),
        ("speed", "km/h", "km/hour", "knot"),
        ("speed", "m s-1", "m/s", "knot"),
        ("area", "km2", "km**2", "m**2"),
        ("area", "ha", "hectare", "m**2"),
        ("volume", "L", "liter", "m**3"),
        ("volume", "litres", "liter", "m**3"),
        ("volume", "cm3", "cm**3", "m**3"),
    ],
)
def test_profile_units_agree_with_pint(dimension: str, unit: str, pint_unit: str, canonical: str) -> None:
    values = np.array([0.0, 1.0, 17.25, 1234.5])
    expected = UREG.Quantity(values, pint_unit).to(canonical).magnitude
    assert units.to_canonical(values, dimension, unit) == pytest.approx(expected, rel=1e-13)


# ---------------------------------------------------------------- CF / UDUNITS spellings
@pytest.mark.parametrize(
    ("unit", "mg_per_m3"),
    [
        # UDUNITS-2 manual, "Unit syntax": a power as m-3, m^-3 or m**-3; a product by space or
        # "."; a quotient by "/"; a leading number scales the unit (0.001 kg m-3 = 1 g m-3).
        # Factors by SI prefixes: 1 ug/L = 1e-9 kg / 1e-3 m3 = 1e-6 kg m-3 = 1 mg m-3.
        ("mg m-3", 1.0),
        ("mg m**-3", 1.0),
        ("mg m^-3", 1.0),
        ("mg.m-3", 1.0),
        ("mg/m3", 1.0),
        ("kg/m^3", 1e6),
        ("kg m-3", 1e6),
        ("0.001 kg m-3", 1e3),
        ("g m-3", 1e3),
        ("microgram/L", 1.0),
        ("ug/L", 1.0),
        ("ug L-1", 1.0),
        ("µg/L", 1.0),
        ("mg/L", 1e3),
    ],
)
def test_udunits_concentration_spellings(unit: str, mg_per_m3: float) -> None:
    scale, offset = units.conversion("concentration", unit)
    assert offset == 0.0
    assert scale == pytest.approx(mg_per_m3, rel=1e-14)


@pytest.mark.parametrize("unit", ["degC", "degree_Celsius", "degrees_C", "deg_C", "degree_C", "celsius", "°C"])
def test_udunits_celsius_spellings(unit: str) -> None:
    # UDUNITS-2 names of the degree Celsius (from memory of udunits2-derived/-common.xml)
    assert units.conversion("temperature", unit) == (1.0, 0.0)


@pytest.mark.parametrize("unit", ["K", "kelvin", "degK", "degrees_K", "Kelvin"])
def test_udunits_kelvin_spellings(unit: str) -> None:
    assert units.conversion("temperature", unit) == (1.0, -273.15)


def test_fraction_and_salinity() -> None:
    assert units.conversion("fraction", "%") == (0.01, 0.0)
    assert units.conversion("fraction", "percent") == (0.01, 0.0)
    assert units.conversion("fraction", "1") == (1.0, 0.0)
    # practical salinity: a number on the PSS-78 scale whatever the label (CF standard name table)
    for label in ("1", "1e-3", "psu", "PSS-78"):
        assert units.conversion("salinity", label) == (1.0, 0.0)


def test_same_unit_across_spellings() -> None:
    assert units.same_unit("concentration", "mg m-3", "ug/L")
    assert units.same_unit("temperature", "K", "kelvin")
    assert not units.same_unit("temperature", "K", "degC")
    assert not units.same_unit("temperature", "K", "furlong")


@settings(max_examples=50, deadline=None)
@given(st.lists(st.floats(-1e6, 1e6, allow_nan=False), min_size=1, max_size=50),
       st.sampled_from([("length", "fathom", 1.8288), ("distance", "nmi", 1.852), ("mass", "g", 1e-3),
                        ("duration", "min", 1 / 60), ("volume", "L", 1e-3)]))
def test_conversion_is_one_factor_per_unit(values: list[float], case: tuple[str, str, float]) -> None:
    # Vectorised: the whole array converts with one factor, element by element the same as
    # converting each value alone (the factors are the published ones above).
    dimension, unit, factor = case
    arr = np.array(values)
    whole = units.to_canonical(arr, dimension, unit)
    assert whole == pytest.approx(arr * factor, rel=1e-14, abs=1e-300)
    assert [units.to_canonical(np.array([v]), dimension, unit)[0] for v in values] == whole.tolist()


# ---------------------------------------------------------------- bad units, each named
@pytest.mark.parametrize(
    ("dimension", "unit", "message"),
    [
        ("mass", "stane", r"^'stane' is not a unit pint or UDUNITS reads .*; give a mass unit in UDUNITS or pint "
                          r"spelling, e\.g\. kg, g, grams, mg, t, tonnes, lb \(harmonize converts to kg\)$"),
        ("distance", "kg", r"^'kg' is kilogram, a unit of \[mass\], not a distance unit; give a distance unit"),
        ("temperature", "C", r"^'C' is coulomb, a unit of \[current\] \* \[time\], not a temperature unit"),
        ("temperature", "0.1 degC", r"^'0\.1 degC' scales a temperature with an offset"),
        ("concentration", "1", r"^'1' is a number, not a concentration unit; give a concentration unit"),
        ("length", "", r"^'' is not a unit; give a length unit"),
        ("length", "m-", r"^'m-' is not a unit pint or UDUNITS reads"),
        ("salinity", "g/kg", r"^'g/kg' is not a practical salinity label: 1, 1e-3"),
        ("colour", "m", r"^'colour' is not a unit dimension harmonize knows"),
    ],
)
def test_bad_units_are_named_with_what_is_accepted(dimension: str, unit: str, message: str) -> None:
    with pytest.raises(units.UnitError, match=message):
        units.conversion(dimension, unit)
    assert not units.is_known(dimension, unit) if dimension in units.DIMENSIONS else True


def test_error_messages_are_one_line() -> None:
    for dimension, unit in (("mass", "stane"), ("speed", "kg"), ("temperature", "0.1 degC")):
        with pytest.raises(units.UnitError) as info:
            units.conversion(dimension, unit)
        assert "\n" not in str(info.value)


# ---------------------------------------------------------------- through the adapters
def _trawl_store(study_dir, depth_unit: str, weight_unit: str):  # type: ignore[no-untyped-def]
    from trawl_profiles import BASIC_PROFILE

    from harmonize import Store, load_study, run

    profile = BASIC_PROFILE.replace('bottom_depth_m = "fathom"', f'bottom_depth_m = "{depth_unit}"')
    profile = profile.replace('weight = "g"', f'weight = "{weight_unit}"')
    assert profile != BASIC_PROFILE or (depth_unit, weight_unit) == ("fathom", "g")
    (study_dir / "profiles" / "trawl_basic.toml").write_text(profile)
    (study_dir / "h.csv").write_text(
        "HAUL_NO,START,END,LAT_S,LON_S,LAT_E,LON_E,WING_M,DEPTH_FM\n"
        "A1,2021-07-01T06:00,2021-07-01T06:30,43.0,-153.0,43.025,-153.0,20,40\n")
    (study_dir / "c.csv").write_text("HAUL,SPECIES,WT_G,N\nA1,keld cod,1000,2\n")
    study = load_study(study_dir)
    run(study, "trawl_basic", {"events": study_dir / "h.csv", "records": study_dir / "c.csv"})
    with Store(study.store_dir).connect(read_only=True) as con:
        return con.execute("""SELECT any_value(bottom_depth_m), max(value) FILTER (WHERE quantity = 'biomass')
                              FROM observations""").fetchall()[0]


@pytest.mark.parametrize(("depth_unit", "metres", "weight_unit", "kg"), [
    # 40 fathoms = 73.152 m (1.8288 m each: 6 international feet, 1959 agreement); 1000 g = 1 kg
    ("fathoms", 73.152, "grams", 1.0),
    # 40 ft = 12.192 m (0.3048 m each); 1000 t = 1e6 kg
    ("feet", 12.192, "tonnes", 1e6),
    ("fm", 73.152, "g", 1.0),
])
def test_profile_units_reach_the_store(study_dir, depth_unit: str, metres: float,  # type: ignore[no-untyped-def]
                                       weight_unit: str, kg: float) -> None:
    depth, biomass = _trawl_store(study_dir, depth_unit, weight_unit)
    assert depth == pytest.approx(metres, rel=1e-12)
    assert biomass == pytest.approx(kg, rel=1e-12)


def test_bad_profile_unit_names_file_section_and_what_is_accepted(study_dir) -> None:  # type: ignore[no-untyped-def]
    from harmonize.errors import ConfigError

    with pytest.raises(ConfigError, match=r"trawl_basic\.toml: \[units\] bottom_depth_m: 'kg' is kilogram, a unit "
                                          r"of \[mass\], not a length unit; give a length unit in UDUNITS or pint "
                                          r"spelling, e\.g\. m, cm"):
        _trawl_store(study_dir, "kg", "g")


@pytest.mark.parametrize(("file_unit", "stored", "expected"), [
    # UDUNITS-2 spellings of a chlorophyll concentration; 1 kg m-3 = 1e6 mg m-3 (SI prefixes)
    ("mg m**-3", 0.5, 0.5),
    ("mg m-3", 0.5, 0.5),
    ("kg/m^3", 5e-7, 0.5),
    ("0.001 kg m-3", 5e-4, 0.5),
    ("microgram/L", 0.5, 0.5),
])
def test_cf_units_spellings_through_the_gridded_adapter(study_dir, file_unit: str, stored: float,  # type: ignore[no-untyped-def]
                                                        expected: float) -> None:
    from gridded_files import regular_file, write_profile

    from harmonize import load_study
    from harmonize.ingest import prepare

    study = load_study(study_dir)
    lat, lon = np.array([43.0, 43.1]), np.array([-152.0, -151.9])
    path = regular_file(study_dir / "chl.nc", {"chl": (np.full((2, 2, 2), stored), {"units": file_unit})},
                        lat, lon, time=[1.0, 2.0])
    write_profile(study_dir, "chl", 'chl = "mass_concentration_of_chlorophyll_a_in_sea_water"')
    adapter, profile = prepare(study, "chl")
    out = adapter.read({"rows": path}, profile, study)
    values = out.values["value"].to_numpy()
    assert len(values) and values == pytest.approx(expected, rel=1e-12)
    assert set(out.values["unit"]) == {"mg m-3"}


def test_bad_cf_units_attribute_names_file_variable_and_unit(study_dir) -> None:  # type: ignore[no-untyped-def]
    from gridded_files import regular_file, write_profile

    from harmonize import load_study
    from harmonize.errors import InputFileError
    from harmonize.ingest import prepare

    study = load_study(study_dir)
    lat, lon = np.array([43.0, 43.1]), np.array([-152.0, -151.9])
    path = regular_file(study_dir / "sst.nc", {"sst": (np.full((2, 2, 2), 9.0), {"units": "furlong"})},
                        lat, lon, time=[1.0, 2.0])
    write_profile(study_dir, "sst", 'sst = "sea_surface_temperature"')
    adapter, profile = prepare(study, "sst")
    with pytest.raises(InputFileError, match=r"sst\.nc: variable 'sst': units 'furlong' is furlong, a unit of "
                                             r"\[length\], not a temperature unit; .* or set force_unit in "
                                             r"\[variables\] of sst\.toml"):
        adapter.read({"rows": path}, profile, study)


def test_bad_speed_unit_of_pings_is_named(study_dir) -> None:  # type: ignore[no-untyped-def]
    import shutil
    from pathlib import Path

    from harmonize import load_study, run
    from harmonize.errors import ConfigError

    fixtures = Path(__file__).resolve().parent.parent / "fixtures"
    shutil.copy(fixtures / "effort" / "pings_hand.csv", study_dir / "pings_hand.csv")
    profile = study_dir / "profiles" / "effort_pings.toml"
    profile.write_text(profile.read_text().replace("[fishing]\n", '[units]\nspeed_kn = "kg"\n\n[fishing]\n', 1))
    with pytest.raises(ConfigError, match=r"effort_pings\.toml: \[units\] speed_kn: 'kg' is kilogram, a unit of "
                                          r"\[mass\], not a speed unit; give a speed unit"):
        run(load_study(study_dir), "effort_pings", {"rows": study_dir / "pings_hand.csv"})


@pytest.mark.parametrize("unit", [["K"], 3, None, {"a": 1}])
def test_a_unit_that_is_not_text_is_named(unit: object) -> None:
    with pytest.raises(units.UnitError, match=r"is not a unit; give a temperature unit"):
        units.conversion("temperature", unit)  # type: ignore[arg-type]


def test_building_the_registry_logs_nothing(caplog: pytest.LogCaptureFixture) -> None:
    # the library never prints; pint's notes about our intended redefinitions are muted
    import logging

    units.registry.cache_clear()
    units._conversion.cache_clear()
    with caplog.at_level(logging.DEBUG):
        assert units.conversion("length", "fathom") == (1.8288, 0.0)
    assert not [r for r in caplog.records if r.name.startswith("pint")]
