"""The data-generating model: one row is one host's one-minute telemetry sample.

Row ``i`` is host ``i % hosts`` at minute ``i // hosts`` after ``START``. Power is linear in the
numeric features with the coefficients below; options add documented extra terms (see truth.py).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timezone
from types import MappingProxyType

import numpy as np
import pyarrow as pa

from . import streams
from .fleet import MACHINE_CLASSES, RACKS, REGIONS, build_fleet
from .options import Options

START = datetime(2026, 11, 1, tzinfo=timezone.utc)
START_US = int(START.timestamp()) * 1_000_000
MINUTES_PER_DAY = 1440

FEATURES = ("cpu_util", "mem_bw_gbps", "disk_iops", "net_gbps", "inlet_temp_c", "fan_rpm")
TARGET = "power_w"
LABEL_COLUMNS = ("host_id", "rack", "region", "machine_class")

TRUE_COEFFICIENTS = MappingProxyType(
    {
        "intercept": 120.0,  # W, idle floor
        "cpu_util": 180.0,  # W per unit utilisation (0..1)
        "mem_bw_gbps": 0.9,  # W per GB/s
        "disk_iops": 0.004,  # W per IOPS
        "net_gbps": 2.5,  # W per Gb/s
        "inlet_temp_c": 1.8,  # W per degree C
        "fan_rpm": 0.006,  # W per rpm
    }
)
NOISE_SD = 8.0  # W
HETERO_SD = (0.3, 1.5)  # heteroskedastic: sd = NOISE_SD * (a + b * cpu_util)

# Additive power offsets (W) with class effects, against the first (reference) level.
CLASS_OFFSETS = MappingProxyType({"compute-a": 0.0, "storage-b": 25.0, "gpu-c": 150.0, "memory-d": 15.0})
REGION_OFFSETS = MappingProxyType({"north-1": 0.0, "north-2": 3.0, "east-1": -5.0, "south-1": 8.0, "west-2": -2.0})

QUADRATIC_CENTER = 24.0  # degrees C
QUADRATIC_COEFFICIENT = 0.25  # W per degree C squared, on (inlet_temp_c - center)**2
OUTLIER_SPIKE_W = (250.0, 750.0)  # spikes are uniform on this range, always upward
CORRELATION_LOADING = 0.97  # correlated mode: loading of each load feature on the shared factor

# How machine classes and regions shift the feature distributions (always on).
_MEM_SHIFT = np.array([0.0, 0.0, 4.0, 10.0])  # GB/s
_IOPS_LOG_SHIFT = np.array([0.0, 0.9, 0.0, 0.0])
_NET_LOG_SHIFT = np.array([0.0, 0.3, 0.6, 0.0])
_REGION_TEMP = np.array([-1.0, -0.5, 0.5, 1.5, 0.0])  # degrees C


def extra_feature_names(k: int) -> tuple[str, ...]:
    """Names of the wide-mode columns: x01..xK (zero-padded to the width of K)."""
    width = max(2, len(str(k)))
    return tuple(f"x{j:0{width}d}" for j in range(1, k + 1))


def extra_coefficients(k: int) -> np.ndarray:
    """Known coefficients of x01..xK: +0.25, -0.50, +0.75, ... cycling up to magnitude 2.0."""
    j = np.arange(k)
    return np.where(j % 2 == 0, 1.0, -1.0) * 0.25 * (1 + j % 8)


@dataclass(frozen=True)
class Chunk:
    """One generated row range and what was injected into it."""

    table: pa.Table
    outlier_rows: int


def _labels(indices: np.ndarray, dictionary: pa.Array) -> pa.DictionaryArray:
    return pa.DictionaryArray.from_arrays(pa.array(indices.astype(np.int32, copy=False)), dictionary)


def _floats(values: np.ndarray, null: np.ndarray | None) -> pa.Array:
    if null is None:
        return pa.array(values)
    validity = pa.py_buffer(np.packbits(~null, bitorder="little"))
    nulls = int(np.count_nonzero(null))
    return pa.Array.from_buffers(pa.float64(), len(values), [validity, pa.py_buffer(values)], nulls)


class Scenario:
    """Draws any row range of the dataset defined by ``seed`` and ``options`` as a pyarrow Table."""

    def __init__(self, seed: int, options: Options) -> None:
        self.seed = seed
        self.options = options
        self.fleet = build_fleet(seed, options.hosts)
        self.features = FEATURES + extra_feature_names(options.extra_features)
        self._extra_coef = extra_coefficients(options.extra_features)
        self._draws = streams.BlockDraws(seed)
        self._racks = pa.array(RACKS)
        self._regions = pa.array(REGIONS)
        self._classes = pa.array(MACHINE_CLASSES)

    def columns(self, *, with_day: bool = True) -> tuple[str, ...]:
        head = ("ts", "day") if with_day else ("ts",)
        return head + LABEL_COLUMNS + self.features + (TARGET,)

    def draw(self, start: int, stop: int, *, text_ts: bool = False, with_day: bool = True) -> Chunk:
        """Rows ``[start, stop)``; ``text_ts`` gives ts as ISO-8601 UTC strings."""
        if not 0 <= start < stop:
            raise ValueError(f"need 0 <= start < stop, got [{start}, {stop})")
        o, fleet = self.options, self.fleet
        host = np.arange(start, stop, dtype=np.int64)
        minute = host // o.hosts
        host %= o.hosts
        values, power = self._features(start, stop, host, minute)
        outliers = 0
        if o.outliers > 0.0:
            u = self._draws.uniform(streams.OUTLIERS, 2, start, stop)
            hit = u[0] < o.outliers
            outliers = int(np.count_nonzero(hit))
            lo, hi = OUTLIER_SPIKE_W
            power += np.where(hit, lo + (hi - lo) * u[1], 0.0)
        nulls = [None] * len(values)
        if o.missing > 0.0:
            nulls = list(self._draws.uniform(streams.MISSING, len(values), start, stop) < o.missing)

        cols: dict[str, pa.Array] = {"ts": self._timestamps(minute, text_ts)}
        if with_day:
            day = minute // MINUTES_PER_DAY
            first = int(day[0])
            days = np.datetime64(START.date(), "D") + np.arange(first, int(day[-1]) + 1)
            cols["day"] = _labels(day - first, pa.array(np.datetime_as_string(days, unit="D")))
        cols["host_id"] = _labels(host, fleet.host_ids)
        cols["rack"] = _labels(fleet.rack[host], self._racks)
        cols["region"] = _labels(fleet.region[host], self._regions)
        cols["machine_class"] = _labels(fleet.machine_class[host], self._classes)
        for name, v, null in zip(self.features, values, nulls):
            cols[name] = _floats(v, null)
        cols[TARGET] = pa.array(power)
        return Chunk(pa.table(cols), outliers)

    def _timestamps(self, minute: np.ndarray, text: bool) -> pa.Array:
        if not text:
            return pa.array(START_US + minute * 60_000_000, type=pa.timestamp("us", tz="UTC"))
        first = int(minute[0])
        stamps = np.datetime64(START.replace(tzinfo=None), "m") + np.arange(first, int(minute[-1]) + 1)
        return _labels(minute - first, pa.array(np.datetime_as_string(stamps, unit="s", timezone="UTC")))

    def _features(self, start: int, stop: int, host: np.ndarray, minute: np.ndarray):
        """Numeric feature arrays (in ``self.features`` order) and the power column."""
        o, fleet = self.options, self.fleet
        z = self._draws.normal(streams.FEATURES, 7 if o.correlated else 6, start, stop)
        cls, region = fleet.machine_class[host], fleet.region[host]
        first = int(minute[0])
        minutes = np.arange(first, int(minute[-1]) + 1)
        diurnal = np.cos((2.0 * np.pi / MINUTES_PER_DAY) * (minutes % MINUTES_PER_DAY - 900))[minute - first]
        base = 0.4 * diurnal + 0.4 * fleet.load[host]  # peak load at 15:00, busy hosts run hotter
        if o.correlated:  # one shared load factor drives cpu, memory, disk and network
            shared = (base + 0.8 * z[6]) / np.sqrt(0.88)
            r = CORRELATION_LOADING
            u = r * shared + np.sqrt(1.0 - r * r) * z[:4]
        else:
            u = z[:4]
            u[0] = (base + 0.8 * z[0]) / np.sqrt(0.88)
        cpu = np.round(1.0 / (1.0 + np.exp(0.2 - 0.9 * u[0])), 4)
        mem = np.round(np.maximum(0.5, 28.0 + 11.0 * u[1] + _MEM_SHIFT[cls]), 3)
        iops = np.round(np.exp(7.4 + 0.55 * u[2] + _IOPS_LOG_SHIFT[cls]))
        net = np.round(np.exp(1.1 + 0.5 * u[3] + _NET_LOG_SHIFT[cls]), 3)
        temp = np.round(23.5 + _REGION_TEMP[region] + 1.6 * z[4], 1)
        fan = np.round(np.maximum(800.0, 2600.0 + 160.0 * (temp - 23.5) + 900.0 * cpu + 250.0 * z[5]))
        values = [cpu, mem, iops, net, temp, fan]

        b = TRUE_COEFFICIENTS
        power = np.full(stop - start, b["intercept"])
        for name, v in zip(FEATURES, values):
            power += b[name] * v
        if o.class_effects:
            power += np.array(list(CLASS_OFFSETS.values()))[cls]
            power += np.array(list(REGION_OFFSETS.values()))[region]
        if o.host_effects:
            power += fleet.offset[host]
        if o.quadratic:
            power += QUADRATIC_COEFFICIENT * (temp - QUADRATIC_CENTER) ** 2
        if o.extra_features:
            extra = self._draws.normal(streams.EXTRAS, o.extra_features, start, stop)
            power += self._extra_coef @ extra
            values.extend(extra)
        sd = NOISE_SD * (HETERO_SD[0] + HETERO_SD[1] * cpu) if o.heteroskedastic else NOISE_SD
        power += sd * self._draws.normal(streams.NOISE, 1, start, stop)[0]
        return values, power
