"""harmonize: bring multi-source ecological survey records into one clean, tagged, audited store."""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

# The public names are loaded when first used, so that `import harmonize` (and the command's
# --help and --version) does not pay for pandas, DuckDB and the geometry stack.
_LAZY = {
    "StudyHandle": "harmonize.api", "open_study": "harmonize.api",
    "IngestResult": "harmonize.ingest", "assign_inputs": "harmonize.ingest", "prepare": "harmonize.ingest",
    "run": "harmonize.ingest",
    "Store": "harmonize.store",
    "Study": "harmonize.study", "load_study": "harmonize.study",
}

if TYPE_CHECKING:
    from harmonize.api import StudyHandle, open_study
    from harmonize.ingest import IngestResult, assign_inputs, prepare, run
    from harmonize.store import Store
    from harmonize.study import Study, load_study

__all__ = [
    "IngestResult", "Store", "Study", "StudyHandle", "__version__", "assign_inputs", "load_study",
    "open_study", "prepare", "run",
]


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'harmonize' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY))
