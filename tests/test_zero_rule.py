"""One zero-filling rule for every adapter (issue 17, finding 1).

The rule, written here from its statement and not from the code: an event of a protocol gets
an inferred zero for a target (taxon, life stage) whose year window holds the event, unless

- the event recorded the taxon at that stage (any stage, for a target without a stage);
- the event recorded the taxon with no stage or a coarse one ("unknown", "mixed", ...): such
  a record may be any stage, so it blocks every staged zero of its taxon (common practice:
  an unstaged catch of 40 fish may hold the juveniles a staged target asks about);
- a record of the taxon at the event went to quarantine.

An event where an unstaged record blocked a staged target is flagged ``stage_unresolved``.
"""

from __future__ import annotations

from pathlib import Path
from types import SimpleNamespace

import pandas as pd
from examples import scaled
from hypothesis import given, settings
from hypothesis import strategies as st

from harmonize import load_study, run
from harmonize.adapters.zero_filling import stage_unresolved_events, zero_fill
from harmonize.store import Store

TAXA = ["A a", "B b", "C c"]
STAGES = [None, "adult", "juvenile", "unknown"]


def _expected_zeros(events: list[tuple[str, int]], caught: list[tuple[str, str, str | None]],
                    blocked: list[tuple[str, str]], targets: list[tuple[str, str | None, int | None, int | None]]
                    ) -> list[tuple[str, str, str | None]]:
    """The rule, one event and one target at a time."""
    out = []
    for event, year in events:
        for taxon, stage, first, last in targets:
            if first is not None and year < first or last is not None and year > last:
                continue
            mine = [s for e, t, s in caught if e == event and t == taxon]
            if stage is None:
                met = bool(mine)
            else:
                met = stage in mine or any(s is None or s == "unknown" for s in mine)
            if met or (event, taxon) in blocked:
                continue
            out.append((event, taxon, stage))
    return out


@settings(max_examples=scaled(80), deadline=None)
@given(data=st.data())
def test_zero_fill_follows_the_rule(data: st.DataObject) -> None:
    k = data.draw(st.integers(1, 4))
    targets = data.draw(st.lists(st.tuples(st.sampled_from(TAXA), st.sampled_from([None, "adult", "juvenile"]),
                                           st.sampled_from([None, 2019]), st.sampled_from([None, 2020])),
                                 min_size=k, max_size=k, unique_by=lambda t: (t[0], t[1])))
    n_ev = data.draw(st.integers(1, 5))
    events = [(f"E{i}", data.draw(st.sampled_from([2018, 2019, 2021]))) for i in range(n_ev)]
    caught = data.draw(st.lists(st.tuples(st.sampled_from([e for e, _ in events] + ["E9"]),
                                          st.sampled_from(TAXA + ["D d"]), st.sampled_from(STAGES)), max_size=10))
    blocked = data.draw(st.lists(st.tuples(st.sampled_from(["E0", "E1"]), st.sampled_from(TAXA)), max_size=3))
    study = SimpleNamespace(targets=pd.DataFrame(
        [("p", t, f, la, s) for t, s, f, la in targets],
        columns=["protocol", "taxon", "first_year", "last_year", "life_stage"]))
    ev = pd.DataFrame(events, columns=["event_id", "year"])
    rc = pd.DataFrame(caught, columns=["event_id", "variable", "life_stage"]).astype(object)
    bl = pd.DataFrame(blocked, columns=["event_id", "variable"])
    expected = sorted(_expected_zeros(events, caught, blocked, targets), key=str)
    for frame in (rc, rc.astype("category")):  # text and integer-coded records mean the same
        got = zero_fill(ev, frame, bl, study, "p", [("count", "1")])  # type: ignore[arg-type]
        got_rows = sorted(((e, t, None if pd.isna(s) else s) for e, t, s in
                           got[["event_id", "variable", "life_stage"]].astype(object).itertuples(index=False)), key=str)
        assert got_rows == expected
        flagged = set(stage_unresolved_events(frame, study, "p"))  # type: ignore[arg-type]
        staged_taxa = {t for t, s, _, _ in targets if s is not None}
        assert flagged == {e for e, t, s in caught if t in staged_taxa and s in (None, "unknown")}


HAULS = """HAUL_NO,START,END,LAT_S,LON_S,LAT_E,LON_E,SPEED_KN,WING_M,DEPTH_FM,BOT_TEMP
A1,2021-07-01T06:00,2021-07-01T06:30,43.0,-153.0,43.025,-153.0,,20,40,
A2,2021-07-02T06:00,2021-07-02T06:30,43.5,-151.5,43.525,-151.5,,20,60,
"""
CATCH = """HAUL,SPECIES,WT_G,N,STAGE
A1,Lumbrena pallida,4000,40,
A2,Lumbrena pallida,1000,10,adults
"""


def _staged_trawl_study(study_dir: Path) -> None:
    targets = study_dir / "targets.csv"
    targets.write_text(targets.read_text() + "keldmar_bottom_trawl,Lumbrena pallida,,,juvenile\n")
    (study_dir / "h.csv").write_text(HAULS)
    (study_dir / "c.csv").write_text(CATCH)


def test_trawl_unstaged_catch_blocks_the_staged_zero(study_dir: Path) -> None:
    """Finding 1: 40 unstaged L. pallida must not sit beside an inferred juvenile count of 0."""
    _staged_trawl_study(study_dir)
    study = load_study(study_dir)
    run(study, "trawl_agency", {"events": study_dir / "h.csv", "records": study_dir / "c.csv"})
    with Store(study.root / "store").connect(read_only=True) as con:
        juv = con.sql("SELECT DISTINCT event_id FROM observations WHERE variable = 'Lumbrena pallida' "
                      "AND life_stage = 'juvenile'").fetchall()
        flags = dict(con.sql("SELECT DISTINCT event_id, list_contains(flags, 'stage_unresolved') "
                             "FROM observations").fetchall())
    # A1 caught unstaged fish: no juvenile zero; A2 caught only adults: a juvenile zero
    assert juv == [("A2",)]
    assert flags == {"A1": True, "A2": False}


def test_every_adapter_calls_the_one_rule() -> None:
    """Trawl, plankton, transect and opportunistic zero-fill through common.zero_fill only."""
    root = Path(__file__).resolve().parent.parent / "harmonize" / "adapters"
    for kind in ("trawl", "plankton", "transect", "opportunistic"):
        text = (root / f"{kind}.py").read_text()
        assert "zero_fill" in text and "staged_taxa" not in text, kind
