"""The statistic registry: the names a manifest uses → the statistic classes that build their programs.

Theory of operation: the built-in statistics are listed in ``BUILT_IN`` and registered when this module is
imported. A custom statistic written against the builder API (``library.statistic``, ``library.blocks``) registers
itself with ``register_statistic`` from a plugin file the manifest lists (see
``configs/delivery-spread/spread.py``); ``manifest.load_plugins`` imports such files before the manifest's
``statistic`` section is read. The manifest reader builds that section's model from ``parameter_models()`` and the
compiler makes the statistic with ``statistic_for``. Imports point one way: the statistic modules import only the
base (``library.statistic``), this module imports them, and the manifest reader and the compiler import this one.
"""

from __future__ import annotations

from typing import Any, TypeVar, get_args

from jointstat.circuit.agreement import Manifest
from jointstat.circuit.library.aggregate import Count, Mean, Sum, Variance
from jointstat.circuit.library.compare import Compare
from jointstat.circuit.library.histogram import Histogram
from jointstat.circuit.library.join import KeyedJoin
from jointstat.circuit.library.quantile import Quantile
from jointstat.circuit.library.statistic import Statistic
from jointstat.circuit.parameters import StatisticParameters

S = TypeVar("S", bound=type[Statistic[Any]])

BUILT_IN: tuple[type[Statistic[Any]], ...] = (
    Count,
    Sum,
    Mean,
    Variance,
    Compare,
    Histogram,
    KeyedJoin,
    Quantile,
)

_REGISTRY: dict[str, type[Statistic[Any]]] = {}


def register_statistic(cls: S) -> S:
    """Class decorator: make ``cls`` available to manifests under ``cls.name``."""
    tag = cls.Parameters.model_fields["name"].annotation
    names = get_args(tag)
    if names != (cls.name,):
        raise ValueError(f"statistic {cls.name!r}: Parameters.name must be Literal[{cls.name!r}], got {tag}")
    existing = _REGISTRY.get(cls.name)
    if existing is not None and existing is not cls and existing.__qualname__ != cls.__qualname__:
        raise ValueError(f"a statistic named {cls.name!r} is registered already ({existing.__module__})")
    _REGISTRY[cls.name] = cls
    return cls


for _built_in in BUILT_IN:
    register_statistic(_built_in)


def registered() -> dict[str, type[Statistic[Any]]]:
    return dict(_REGISTRY)


def parameter_models() -> list[type[StatisticParameters]]:
    return [cls.Parameters for _, cls in sorted(_REGISTRY.items())]


def statistics_for(manifest: Manifest) -> list[Statistic[Any]]:
    """Every statistic of the manifest, in order, each knowing where the manifest wrote it."""
    return [_REGISTRY[use.kind](use.params, manifest, use) for use in manifest.uses()]


def statistic_for(manifest: Manifest) -> Statistic[Any]:
    """The first statistic (the only one of a single-statistic manifest)."""
    return statistics_for(manifest)[0]
