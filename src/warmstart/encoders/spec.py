"""The EncoderSpec: what an encoder is and what it hands to a decoder (no torch needed)."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Mapping

__all__ = ["Stage", "EncoderSpec", "SPEC_VERSION"]

SPEC_VERSION = 1


@dataclass(frozen=True)
class Stage:
    """One feature map handed to a decoder: its channels and its stride (input pixels per pixel)."""

    channels: int
    stride: int


@dataclass(frozen=True)
class EncoderSpec:
    """Registry name, constructor parameters and output stages of an encoder.

    Examples
    --------
    >>> s = EncoderSpec("unet", {"in_channels": 1, "base_width": 8, "depth": 3}, (Stage(8, 1), Stage(16, 2), Stage(32, 4)))
    >>> EncoderSpec.from_dict(s.to_dict()) == s
    True
    """

    name: str
    params: Mapping[str, Any] = field(default_factory=dict)
    stages: tuple[Stage, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {"version": SPEC_VERSION, "name": self.name, "params": dict(self.params),
                "stages": [{"channels": s.channels, "stride": s.stride} for s in self.stages]}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> "EncoderSpec":
        if d.get("version") != SPEC_VERSION:
            raise ValueError(f"encoder spec version {d.get('version')!r} unknown; this warmstart reads {SPEC_VERSION}")
        unknown = sorted(set(d) - {"version", "name", "params", "stages"})
        if unknown:
            raise ValueError(f"unknown encoder spec fields: {', '.join(unknown)}")
        return cls(str(d["name"]), dict(d.get("params", {})),
                   tuple(Stage(int(s["channels"]), int(s["stride"])) for s in d.get("stages", [])))

    @property
    def out_channels(self) -> int:
        """Channels of the deepest stage (what a projection head pools)."""
        return self.stages[-1].channels
