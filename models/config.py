"""Configs stored in a bundle's manifest as JSON objects: a dataclass mixin for the round trip."""
from __future__ import annotations

from dataclasses import asdict
from typing import Any, Mapping, TypeVar

T = TypeVar("T", bound="Stored")


class Stored:
    """to_dict / from_dict for a dataclass of plain values; from_dict ignores keys the class does
    not know (a bundle written by a newer version) and leaves missing ones at their defaults (an
    older bundle)."""

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls: type[T], d: Mapping[str, Any]) -> T:
        names = cls.__dataclass_fields__
        return cls(**{k: v for k, v in d.items() if k in names})
