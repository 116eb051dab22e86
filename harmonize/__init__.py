"""harmonize: bring multi-source ecological survey records into one clean, tagged, audited store."""

from __future__ import annotations

__version__ = "0.1.0"

from harmonize.api import StudyHandle, open_study  # noqa: E402
from harmonize.ingest import IngestResult, assign_inputs, prepare, run  # noqa: E402
from harmonize.store import Store  # noqa: E402
from harmonize.study import Study, load_study  # noqa: E402

__all__ = [
    "IngestResult", "Store", "Study", "StudyHandle", "__version__", "assign_inputs", "load_study",
    "open_study", "prepare", "run",
]
