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
