"""The invented server fleet: hosts, racks, regions and machine classes."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from . import streams

REGIONS = ("north-1", "north-2", "east-1", "south-1", "west-2")
MACHINE_CLASSES = ("compute-a", "storage-b", "gpu-c", "memory-d")
CLASS_SHARES = (0.4, 0.3, 0.2, 0.1)
RACKS = tuple(f"r{i:02d}" for i in range(1, 41))
HOST_OFFSET_SD = 20.0  # W, sd of the per-host offset (used with host effects)
HOST_OFFSET_LOAD_CORR = 0.6  # correlation of a host's offset with its baseline load


@dataclass(frozen=True)
class Fleet:
    """Per-host attributes, indexed by host number 0..hosts-1."""

    host_ids: pa.Array  # "h000000", ...
    rack: np.ndarray  # int32 index into RACKS
    region: np.ndarray  # int32 index into REGIONS (racks are grouped into regions)
    machine_class: np.ndarray  # int32 index into MACHINE_CLASSES
    load: np.ndarray  # baseline load of the host, standard normal
    offset: np.ndarray  # W, per-host power offset (only added with host effects)

    @property
    def size(self) -> int:
        return len(self.rack)


def build_fleet(seed: int, hosts: int) -> Fleet:
    """Draw the fleet for ``seed``; independent of every per-row stream."""
    g = streams.generator(seed, streams.HOSTS)
    rack = g.integers(0, len(RACKS), size=hosts).astype(np.int32)
    region = (rack * len(REGIONS) // len(RACKS)).astype(np.int32)
    machine_class = g.choice(len(MACHINE_CLASSES), size=hosts, p=CLASS_SHARES).astype(np.int32)
    load = g.standard_normal(hosts)
    rho = HOST_OFFSET_LOAD_CORR
    offset = HOST_OFFSET_SD * (rho * load + np.sqrt(1.0 - rho * rho) * g.standard_normal(hosts))
    host_ids = pa.array([f"h{i:06d}" for i in range(hosts)], type=pa.string())
    return Fleet(host_ids, rack, region, machine_class, load, offset)
