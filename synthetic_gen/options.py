"""Scenario options and their validation."""

from __future__ import annotations

from dataclasses import asdict, dataclass


@dataclass(frozen=True)
class Options:
    """What is switched on in the data-generating model (all off: plain linear model)."""

    class_effects: bool = False
    correlated: bool = False
    missing: float = 0.0
    heteroskedastic: bool = False
    outliers: float = 0.0
    host_effects: bool = False
    quadratic: bool = False
    extra_features: int = 0
    hosts: int = 2000

    def __post_init__(self) -> None:
        for name in ("missing", "outliers"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise TypeError(f"{name} must be a fraction, got {value!r}")
            if not 0.0 <= value < 1.0:
                raise ValueError(f"{name} must be a fraction in [0, 1), got {value!r}")
        for name, low in (("extra_features", 0), ("hosts", 1)):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int):
                raise TypeError(f"{name} must be an integer, got {value!r}")
            if value < low:
                raise ValueError(f"{name} must be >= {low}, got {value}")

    def as_dict(self) -> dict:
        return asdict(self)
