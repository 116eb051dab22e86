"""The adapter registry: built-ins register themselves, outside packages use entry points."""

from __future__ import annotations

import warnings
from functools import cache
from importlib import import_module
from importlib.metadata import entry_points

from harmonize.adapters.base import Adapter
from harmonize.errors import AdapterNotFoundError, HarmonizeWarning

ENTRY_POINT_GROUP = "harmonize.adapters"
_BUILTIN_MODULES = (
    "harmonize.adapters.trawl",
    "harmonize.adapters.plankton",
    "harmonize.adapters.transect",
    "harmonize.adapters.opportunistic",
    "harmonize.adapters.gridded",
    "harmonize.adapters.effort",
)
_REGISTRY: dict[str, type[Adapter]] = {}


def register(adapter: type[Adapter]) -> type[Adapter]:
    """Register an adapter class under its ``kind`` (usable as a decorator)."""
    _REGISTRY[adapter.kind] = adapter
    return adapter


@cache
def _load_all() -> None:
    for module in _BUILTIN_MODULES:
        try:
            import_module(module)
        except ModuleNotFoundError as exc:
            if exc.name != module:  # a real import error inside an existing adapter
                raise
    for ep in entry_points(group=ENTRY_POINT_GROUP):
        try:
            register(ep.load())
        except Exception as exc:  # noqa: BLE001 - a broken plug-in must not stop the tool
            warnings.warn(
                f"adapter plug-in '{ep.name}' ({ep.value}) failed to load: {exc}",
                HarmonizeWarning,
                stacklevel=2,
            )


def list_adapters() -> dict[str, type[Adapter]]:
    """Every available adapter, by kind."""
    _load_all()
    return dict(sorted(_REGISTRY.items()))


def get_adapter(kind: str) -> Adapter:
    """An instance of the adapter for ``kind``."""
    adapters = list_adapters()
    if kind not in adapters:
        available = ", ".join(adapters) or "none"
        raise AdapterNotFoundError(
            f"no adapter for source kind '{kind}'; available: {available}. Outside adapters "
            f"install as packages exposing the '{ENTRY_POINT_GROUP}' entry point."
        )
    return adapters[kind]()
