"""Commercial fishing effort: the adapter of source kind "effort", in two forms.

Vessel position pings (harmonize.adapters.pings) or logbook hauls
(harmonize.adapters.logbooks) -> fishing hours per grid cell x season_year x season x gear x
depth layer; the settings, gear rules and output they share are in harmonize.adapters.fishing.
The form is the profile's ``[fishing] form``, or guessed from the file's columns.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

from harmonize.adapters.base import Adapter, AdapterOutput, ProgressCallback
from harmonize.adapters.fishing import fishing_settings
from harmonize.adapters.logbooks import read_logbook
from harmonize.adapters.pings import PingReader, file_columns
from harmonize.adapters.registry import register
from harmonize.config_spec import Map, Table, Value, number, text
from harmonize.contract import fields
from harmonize.errors import InputFileError
from harmonize.profile import Profile
from harmonize.study import Study


@register
class EffortAdapter(Adapter):
    kind = "effort"
    description = ("Commercial fishing effort from vessel position pings or logbook hauls; "
                   "effort = fishing hours (h) per cell, season, gear and depth layer.")
    tables = {"rows": "effort_pings"}
    forms = {"pings": "effort_pings", "logbook": "effort_logbook"}
    is_sample = False
    row_traced = False
    merges_parts = True
    parts_add_up = True
    is_fishing_effort = True
    locates_vessels = True
    effort_label = "fishing hours"
    events_called = "fishing cell-periods"
    designed = False
    default_provider_type = "industry"
    display_order = 60
    reads_formats = False
    profile_sections = {
        "fishing": Table({
            "form": text("Pings or logbook (guessed from the columns when absent).", enum=("pings", "logbook")),
            "speed_min_kn": number("Lower end of the fishing speed window (knots).", exclusive_minimum=0, default=2.0),
            "speed_max_kn": number("Upper end of the fishing speed window (knots).", exclusive_minimum=0, default=5.0),
            "max_gap_h": number("Each half-interval a ping gets is capped at max_gap_h / 2.", exclusive_minimum=0,
                                default=2.0),
            "max_speed_kn": number("Faster pings -> implausible_speed.", exclusive_minimum=0),
            "pelagic_layer": text("Depth layer of pelagic gears."),
            "quarantine_rows": Value("integer", "How many rejected pings are kept row by row.", minimum=0),
            "memory_limit": text("DuckDB working memory of the ping ingest, e.g. 2GB."),
            "gears": Map(Table({
                "speed_min_kn": number("Lower end of this gear's speed window (knots).", exclusive_minimum=0),
                "speed_max_kn": number("Upper end of this gear's speed window (knots).", exclusive_minimum=0),
                "contact": text("Where the gear fishes.", enum=("bottom", "pelagic")),
                "layer": text("Depth layer of this gear."),
            }), "Per-gear overrides: [fishing.gears.CODE]."),
        }, "Fishing-effort rules."),
    }
    profile_example = """\
[fishing]
# form = "pings"              # pings | logbook (guessed from the columns when absent)
# speed_min_kn = 2.0          # fishing speed window for bottom trawl (common practice)
# speed_max_kn = 5.0
# max_gap_h = 2.0             # a ping gets half of each neighbouring interval, capped
# pelagic_layer = "epipelagic"
"""

    def table_fields(self) -> dict[str, set[str]]:
        """Both forms map onto one ``[columns]`` table: the union of their fields."""
        return {"rows": {f.name for schema in self.forms.values() for f in fields(schema)}}

    def read(
        self,
        inputs: Mapping[str, Path],
        profile: Profile,
        study: Study,
        progress: ProgressCallback | None = None,
    ) -> AdapterOutput:
        settings = fishing_settings(profile, study)
        path = Path(inputs["rows"])
        if not path.is_file():
            raise InputFileError(path, "no such file")
        columns = file_columns(path, profile)
        form = settings.form or _guess_form(columns, profile)
        if form == "logbook":
            return read_logbook(path, profile, study, settings, progress)
        return PingReader(path, profile, study, settings, columns, progress).run()


def _guess_form(columns: list[str], profile: Profile) -> str:
    """Logbook when the file (or the profile) has start/end times, pings otherwise."""
    mapped = profile.column_map("rows")
    folded = {c.casefold() for c in columns}
    has = {f for f in ("start_time", "end_time", "time")
           if (f in mapped and mapped[f].casefold() in folded) or f in folded or f in profile.constants}
    return "logbook" if {"start_time", "end_time"} <= has else "pings"


__all__ = ["EffortAdapter"]
