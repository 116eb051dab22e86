"""The adapter registry: built-ins register themselves, outside packages use entry points."""

from __future__ import annotations

import warnings
from functools import cache
from importlib import import_module
from importlib.metadata import entry_points

from harmonize.adapters.base import Adapter
from harmonize.errors import AdapterNotFoundError, HarmonizeWarning
from harmonize.sql import sql_in

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
    """Register an adapter class under its ``kind`` (usable as a decorator).

    A second class for a kind already registered replaces the first with a HarmonizeWarning
    (the same class registered again, e.g. by a module reloaded, replaces it silently).
    """
    known = _REGISTRY.get(adapter.kind)
    if known is not None and _name(known) != _name(adapter):
        warnings.warn(
            f"adapter {_name(adapter)} replaces {_name(known)} for source kind '{adapter.kind}'",
            HarmonizeWarning,
            stacklevel=2,
        )
    _REGISTRY[adapter.kind] = adapter
    return adapter


def _name(adapter: type[Adapter]) -> str:
    return f"{adapter.__module__}.{adapter.__qualname__}"


@cache
def _load_all() -> None:
    for module in _BUILTIN_MODULES:
        import_module(module)
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


def kinds(**traits: object) -> tuple[str, ...]:
    """Names of the available kinds in display order, those whose class attributes equal ``traits``.

    ``kinds()`` lists all; ``kinds(is_sample=True)`` the kinds whose events sample organisms.
    """
    unknown = [t for t in traits if not hasattr(Adapter, t)]
    if unknown:
        raise AttributeError(f"Adapter has no attribute {unknown[0]!r}")
    chosen = [a for a in list_adapters().values()
              if all(getattr(a, t) == v for t, v in traits.items())]
    return tuple(a.kind for a in sorted(chosen, key=lambda a: (a.display_order, a.kind)))


def kinds_sql(column: str = "source_kind", negate: bool = False, **traits: object) -> str:
    """SQL condition: ``column`` names one of :func:`kinds` ``(**traits)`` (none of them with ``negate``).

    ``kinds_sql(grid_values=True)`` -> ``source_kind IN ('gridded')``; always false (always
    true with ``negate``) when no kind has the traits. The one place a selection of source
    kinds becomes SQL text.
    """
    return sql_in(column, kinds(**traits), negate=negate)


def adapter_class(kind: str) -> type[Adapter]:
    """The adapter class for ``kind`` (its class attributes describe the kind)."""
    adapters = list_adapters()
    if kind not in adapters:
        _not_found(kind, adapters)
    return adapters[kind]


def get_adapter(kind: str) -> Adapter:
    """An instance of the adapter for ``kind``."""
    return adapter_class(kind)()


def _not_found(kind: str, adapters: dict[str, type[Adapter]]) -> None:
    available = ", ".join(adapters) or "none"
    raise AdapterNotFoundError(
        f"no adapter for source kind '{kind}'; available: {available}. Outside adapters "
        f"install as packages exposing the '{ENTRY_POINT_GROUP}' entry point."
    )
