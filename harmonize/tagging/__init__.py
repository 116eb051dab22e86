"""Pure, vectorised tagging: season, depth layer, grid cell and stratum."""

from harmonize.tagging.depth import INTEGRATED, NEAR_BOTTOM, tag_depth_layer
from harmonize.tagging.season import (
    calendar_year,
    local_sql,
    local_times,
    season_bounds,
    season_sql,
    season_year_bounds,
    season_year_offsets,
    tag_season,
)
from harmonize.tagging.space import Grid, assign_strata, inside_domain, normalise_lon

__all__ = [
    "INTEGRATED",
    "NEAR_BOTTOM",
    "Grid",
    "assign_strata",
    "calendar_year",
    "inside_domain",
    "local_sql",
    "local_times",
    "normalise_lon",
    "season_bounds",
    "season_sql",
    "season_year_bounds",
    "season_year_offsets",
    "tag_depth_layer",
    "tag_season",
]
