"""Profiles of the trawl tests, shared by several test modules."""

BASIC_PROFILE = """
[source]
id = "keldmar_trawl_basic"
kind = "trawl"
provider_type = "agency"
protocol = "keldmar_bottom_trawl"
timezone = "UTC"

[columns.events]
event_id = "HAUL_NO"
start_time = "START"
end_time = "END"
start_lat = "LAT_S"
start_lon = "LON_S"
end_lat = "LAT_E"
end_lon = "LON_E"
net_width_m = "WING_M"
bottom_depth_m = "DEPTH_FM"

[columns.records]
event_id = "HAUL"
taxon = "SPECIES"
weight = "WT_G"
count = "N"

[units]
bottom_depth_m = "fathom"
weight = "g"
"""


#: The trawl profile of the generated hauls and catch rows of the block tests (minimal columns).
GENERATED_TRAWL_PROFILE = """\
[source]
id = "gen_trawl"
kind = "trawl"
provider_type = "agency"
protocol = "keldmar_bottom_trawl"

[columns.events]
event_id = "haul_id"

[columns.records]
event_id = "haul_id"
taxon = "species"
"""


def generated_hauls(draw, n_hauls: int) -> list[str]:  # type: ignore[no-untyped-def]
    """The lines of a generated haul file (header first) for GENERATED_TRAWL_PROFILE: hauls
    H0.. in three years, with a bottom temperature that is a number, empty or not a number.
    ``draw`` is a hypothesis draw function (inside an ``st.composite``)."""
    from hypothesis import strategies as st

    hauls = ["haul_id,start_time,end_time,start_lat,start_lon,end_lat,end_lon,net_width_m,bottom_depth_m,"
             "bottom_temperature"]
    for i in range(n_hauls):
        year = draw(st.sampled_from([2014, 2018, 2021]))
        temp = draw(st.sampled_from(["4.5", "", "x"]))
        hauls.append(f"H{i},{year}-07-0{i % 9 + 1}T08:00,{year}-07-0{i % 9 + 1}T08:30,"
                     f"56.{i},4.{i},56.{i}3,4.{i}2,17,80,{temp}")
    return hauls
