"""Life stages as providers write them -> one spelling; stages too coarse to name one stage."""

from __future__ import annotations

import pandas as pd

#: Plural and variant spellings of life stages, mapped to the singular (common practice).
LIFE_STAGE_SPELLINGS = {
    "adults": "adult", "larvae": "larva", "larvas": "larva", "juveniles": "juvenile",
    "eggs": "egg", "nauplii": "nauplius", "copepodites": "copepodite", "zoeae": "zoea",
    "zoeas": "zoea", "megalopae": "megalopa", "post-larva": "postlarva", "post-larvae": "postlarva",
    "postlarvae": "postlarva",
}
#: Life-stage words that do not name one stage: a record so marked may hold any stage of its
#: taxon, like a record without a stage (common practice in catch and count sheets).
COARSE_LIFE_STAGES = frozenset({"unknown", "unstaged", "undetermined", "mixed", "all", "unsorted"})


def normalise_life_stage(stage: pd.Series) -> pd.Series:
    """Life stages in lower case and singular ("Larvae" -> "larva"); blanks stay null."""
    folded = stage.astype("string").str.strip().str.casefold().replace("", pd.NA)
    return folded.replace(LIFE_STAGE_SPELLINGS).astype("string")
