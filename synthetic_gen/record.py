"""The truth record (truth.json) written beside the data: the exact model, options and files."""

from __future__ import annotations

from .fleet import CLASS_SHARES, HOST_OFFSET_LOAD_CORR, HOST_OFFSET_SD, MACHINE_CLASSES, RACKS, REGIONS
from .scenario import (
    CLASS_OFFSETS,
    CORRELATION_LOADING,
    HETERO_SD,
    LABEL_COLUMNS,
    MINUTES_PER_DAY,
    NOISE_SD,
    OUTLIER_SPIKE_W,
    QUADRATIC_CENTER,
    QUADRATIC_COEFFICIENT,
    REGION_OFFSETS,
    START,
    TARGET,
    TRUE_COEFFICIENTS,
    Scenario,
    extra_coefficients,
)

VERSION = 1


def _column_types(s: Scenario, text_ts: bool, with_day: bool) -> list[dict]:
    ts = "string (ISO-8601, UTC)" if text_ts else "timestamp[us, tz=UTC]"
    cols = [{"name": "ts", "type": ts}]
    if with_day:
        cols.append({"name": "day", "type": "string (YYYY-MM-DD)"})
    cols += [{"name": c, "type": "string"} for c in LABEL_COLUMNS]
    cols += [{"name": c, "type": "float64", "nullable": True} for c in s.features]
    return cols + [{"name": TARGET, "type": "float64"}]


def build(s: Scenario, rows: int, *, fmt: str, chunk_rows: int, files: int, by_day: str | None,
          text_ts: bool, with_day: bool) -> dict:
    """Everything needed to check a fit against the data-generating model."""
    o = s.options
    coefficients = dict(TRUE_COEFFICIENTS)
    coefficients.update(zip(s.features[len(TRUE_COEFFICIENTS) - 1 :], extra_coefficients(o.extra_features).tolist()))
    noise = {"distribution": "normal", "sd": NOISE_SD, "heteroskedastic": o.heteroskedastic}
    if o.heteroskedastic:
        noise["sd_formula"] = f"{NOISE_SD} * ({HETERO_SD[0]} + {HETERO_SD[1]} * cpu_util)"
    truth = {
        "generator": "synthetic_gen",
        "version": VERSION,
        "scenario": "server fleet: one row is one host's one-minute telemetry; target is power draw in W",
        "seed": s.seed,
        "rows": rows,
        "format": fmt,
        "chunk_rows": chunk_rows,
        "options": o.as_dict(),
        "layout": {"files_per_split": files, "by_day": by_day},
        "model": "power_w = intercept + sum(coefficients[f] * f for f in features) + terms + noise",
        "target": TARGET,
        "features": list(s.features),
        "coefficients": coefficients,
        "noise": noise,
        "terms": _terms(s),
        "columns": _column_types(s, text_ts, with_day),
        "fleet": {
            "start": START.isoformat().replace("+00:00", "Z"),
            "row_order": "row i is host i % hosts at minute i // hosts after start",
            "hosts": o.hosts,
            "rows_per_day": o.hosts * MINUTES_PER_DAY,
            "regions": list(REGIONS),
            "racks": f"{RACKS[0]}..{RACKS[-1]}, grouped in order into the regions",
            "machine_classes": dict(zip(MACHINE_CLASSES, CLASS_SHARES)),
        },
    }
    if by_day == "hive":
        truth["layout"]["partition_column"] = "day (in the directory name day=YYYY-MM-DD, not in the files)"
    return truth


def _terms(s: Scenario) -> dict:
    """Additive terms beyond the numeric linear part (absent ones are null)."""
    o = s.options
    terms: dict = {"class_effects": None, "host_effects": None, "quadratic": None, "outliers": None,
                   "missing": None, "correlated": None}
    if o.class_effects:
        terms["class_effects"] = {
            "machine_class": {"reference": MACHINE_CLASSES[0], "offsets_w": dict(CLASS_OFFSETS)},
            "region": {"reference": REGIONS[0], "offsets_w": dict(REGION_OFFSETS)},
            "note": "machine class and region also shift the feature distributions, "
            "so a fit without these factors is biased",
        }
    if o.host_effects:
        ids = s.fleet.host_ids.to_pylist()
        terms["host_effects"] = {
            "sd_w": HOST_OFFSET_SD,
            "note": f"offsets correlate ({HOST_OFFSET_LOAD_CORR}) with each host's baseline cpu load, "
            "so a fit without host effects is biased; the intercept absorbs their mean",
            "sample_mean_w": float(s.fleet.offset.mean()),
            "offsets_w": dict(zip(ids, s.fleet.offset.tolist())),
        }
    if o.quadratic:
        c, q = QUADRATIC_CENTER, QUADRATIC_COEFFICIENT
        b0, bt = TRUE_COEFFICIENTS["intercept"], TRUE_COEFFICIENTS["inlet_temp_c"]
        terms["quadratic"] = {
            "term": f"(inlet_temp_c - {c})**2",
            "coefficient": q,
            "raw_polynomial": {"intercept": b0 + q * c * c, "inlet_temp_c": bt - 2 * q * c, "inlet_temp_c**2": q},
        }
    if o.outliers:
        terms["outliers"] = {"fraction": o.outliers, "spike_w": f"uniform({OUTLIER_SPIKE_W[0]}, {OUTLIER_SPIKE_W[1]})",
                             "note": "added to power_w of randomly chosen rows, always upward"}
    if o.missing:
        terms["missing"] = {"fraction": o.missing, "columns": list(s.features),
                            "note": "independent per cell (MCAR), applied after power_w is computed"}
    if o.correlated:
        terms["correlated"] = {"shared_factor_loading": CORRELATION_LOADING,
                               "columns": ["cpu_util", "mem_bw_gbps", "disk_iops", "net_gbps"]}
    return terms
