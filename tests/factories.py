"""Build stores from hand-made frames, for tests of the audit and the exports."""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pandas as pd

from harmonize.adapters.base import AdapterOutput, InputFile
from harmonize.ingest import IngestResult, store_output
from harmonize.profile import Profile
from harmonize.study import Study

_EVENT_DEFAULTS = {
    "event_end": pd.NaT, "depth_min_m": float("nan"), "depth_max_m": float("nan"),
    "bottom_depth_m": float("nan"), "on_bottom": False, "effort": 1.0, "effort_unit": "km2",
    "observer_id": None,
}
_VALUE_DEFAULTS = {
    "variable_kind": "taxon", "life_stage": None, "quantity": "count", "unit": "1",
    "zero_filled": False, "n_values": 1, "n_vessels": None, "no_effort": False,
}


def store_frames(
    study: Study,
    events: pd.DataFrame,
    values: pd.DataFrame,
    *,
    source_id: str,
    kind: str,
    provider_type: str = "agency",
    protocol: str | None = None,
    file_name: str | None = None,
    replace: bool = False,
) -> IngestResult:
    """Commit hand-made events and values to the study's store as one ingest.

    ``events`` needs event_id, event_start, lat, lon (other event columns get defaults, and
    may carry depth_layer/cell_id to set those tags); ``values`` needs event_id, variable,
    value.
    """
    ev = events.copy()
    for col, default in _EVENT_DEFAULTS.items():
        if col not in ev:
            ev[col] = default
    ev["event_start"] = pd.to_datetime(ev["event_start"])
    ev["event_end"] = pd.to_datetime(ev["event_end"])
    ev["flags"] = [[] for _ in range(len(ev))]
    ev["source_row"] = range(1, len(ev) + 1)
    va = values.copy()
    for col, default in _VALUE_DEFAULTS.items():
        if col not in va:
            va[col] = default
    # values may carry a "flags" column of lists (e.g. ["probable_duplicate"]); default none
    va["flags"] = [list(f) if isinstance(f, list | tuple) else [] for f in va["flags"]] if "flags" in va else [[] for _ in range(len(va))]
    va["source_record_rows"] = [[] for _ in range(len(va))]
    name = file_name or f"{source_id}.csv"
    digest = hashlib.sha256(pd.util.hash_pandas_object(va.drop(columns=["flags", "source_record_rows"]).astype(str)).values.tobytes()).hexdigest()
    files = [InputFile("events", Path(name), digest, len(ev), len(ev), 0)]
    empty_q = pd.DataFrame({"source_file": [], "source_row": [], "reason_code": [], "message": [], "raw": []})
    out = AdapterOutput(events=ev, values=va, quarantine=empty_q, files=files)
    profile = Profile(path=study.root / "profiles" / f"{source_id}.toml", source_id=source_id, kind=kind,
                      provider_type=provider_type, protocol=protocol, raw={"source": {"id": source_id}})
    return store_output(study, profile, kind, out, replace=replace)


def messy_ping_text(rng: np.random.Generator, vessels: int, per_vessel: int, start: str,
                    gears: tuple[str, ...]) -> tuple[pd.DataFrame, np.ndarray]:
    """Pings of the demo's fleet as the text a provider writes (columns vessel, time_utc, lat,
    lon, sog, gear), with about 15 % of the speeds missing and about 2 % of the positions
    jumping 0.4 degrees north; returns the frame and the rows of the jumps."""
    from harmonize.demo.sources.effort import simulate_pings

    df = simulate_pings(rng, vessels, per_vessel, start=start, gears=gears)
    df = df.drop(columns="fishing").rename(columns={"vessel_name": "vessel", "utc_time": "time_utc",
                                                    "latitude": "lat", "longitude": "lon", "sog_kn": "sog",
                                                    "gear_code": "gear"})
    df["time_utc"] = df["time_utc"].dt.strftime("%Y-%m-%dT%H:%M:%SZ")
    df = df.astype({"lat": str, "lon": str, "sog": str})
    n = len(df)
    df.loc[rng.random(n) < 0.15, "sog"] = ""
    jumps = np.flatnonzero(rng.random(n) < 0.02)
    df.loc[jumps, "lat"] = (df.loc[jumps, "lat"].astype(float) + 0.4).round(5).astype(str)
    return df, jumps
