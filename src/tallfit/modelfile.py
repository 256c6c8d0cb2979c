"""Model files: versioned, self-describing JSON; no pickle, safe to load from anywhere.

Layout (format ``tallfit-model``, version 1)::

    {"format": "tallfit-model", "format_version": 1, "library_version": "...",
     "model": {spec, terms, inference, aliased, condition_number, digits, solver, refinement,
               source, options, warnings},
     "accumulator": {names, R (upper triangle by rows), n_read, n_used, dropped_by_column,
                     col_min, col_max}}

Floats are written with Python's shortest round-trip repr, so they load back bit for bit;
non-finite values, which JSON lacks, are written as the strings "NaN", "Infinity", "-Infinity".
One large table, an absorbed key's level means (levels × terms, for the second pass), is written
as {"dtype": "<f8", "shape": [rows, columns], "base64": ...}: the same bits in a third of the text.
"""

from __future__ import annotations

import base64
import json
import math
import os
from typing import Any

import numpy as np

from tallfit import __version__
from tallfit.accumulate.factor import FactorAccumulator
from tallfit.atomic import write_text_atomic
from tallfit.design.spec import ModelSpec
from tallfit.errors import ModelFileError
from tallfit.results import FitResult
from tallfit.solve.exact import Alias
from tallfit.solve.inference import Inference

FORMAT = "tallfit-model"
FORMAT_VERSION = 1
_ARRAYS = ("estimate", "std_error", "t", "p_value", "ci_low", "ci_high", "cov")
_SPECIAL = {"NaN": math.nan, "Infinity": math.inf, "-Infinity": -math.inf}


def _encode(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): _encode(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_encode(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _encode(obj.tolist())
    if isinstance(obj, (np.floating, float)):
        f = float(obj)
        if math.isnan(f):
            return "NaN"
        if math.isinf(f):
            return "Infinity" if f > 0 else "-Infinity"
        return f
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    return obj


def encode_json(obj: Any, indent: int | None = 1) -> str:
    """JSON text with non-finite floats spelled as strings (the convention of model files)."""
    return json.dumps(_encode(obj), indent=indent, allow_nan=False, ensure_ascii=False)


def _floats(values: Any) -> np.ndarray:
    def conv(v):
        if isinstance(v, list):
            return [conv(x) for x in v]
        if isinstance(v, str):
            return _SPECIAL[v]
        return float(v)

    return np.asarray(conv(values), dtype=np.float64)


def _robust_from_doc(r: Any) -> dict | None:
    """The optional robust-errors block (absent in older files): numbers back from JSON's spelling."""
    if not r:
        return None
    r = dict(r)
    r["estimators"] = {
        name: {k: (_floats(v).tolist() if isinstance(v, list) else v) for k, v in est.items()}
        for name, est in r["estimators"].items()
    }
    for key in ("max_leverage", "max_ratio_to_plain"):
        if key in r:
            r[key] = float(_floats(r[key]))
    return r


def pack_array(a: np.ndarray) -> dict:
    """A float64 matrix as JSON: little-endian bytes in base64, with its shape."""
    a = np.ascontiguousarray(a, dtype="<f8")
    return {"dtype": "<f8", "shape": list(a.shape), "base64": base64.b64encode(a.tobytes()).decode("ascii")}


def unpack_array(d: Any) -> np.ndarray:
    """The matrix ``pack_array`` wrote (a list of rows is read too)."""
    if isinstance(d, dict):
        if d.get("dtype") != "<f8":
            raise ValueError(f"array of dtype {d.get('dtype')!r}, expected '<f8'")
        flat = np.frombuffer(base64.b64decode(d["base64"], validate=True), dtype="<f8")
        return flat.reshape([int(n) for n in d["shape"]]).astype(np.float64)
    return _floats(d)


def _coding_doc(coding: dict | None, load: bool = False) -> dict | None:
    """The coding with an absorbed key's level means packed (or, on ``load``, unpacked)."""
    if not coding or "means" not in (coding.get("absorbed") or {}):
        return coding
    absorbed = dict(coding["absorbed"])
    absorbed["means"] = unpack_array(absorbed["means"]) if load else pack_array(np.asarray(absorbed["means"]))
    return {**coding, "absorbed": absorbed}


def model_to_dict(result: FitResult) -> dict:
    inf = result.inference
    inference = {name: getattr(inf, name) for name in Inference.__dataclass_fields__}
    return {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "library_version": __version__,
        "model": {
            "spec": result.spec.to_dict(),
            "terms": list(result.terms),
            "inference": inference,
            "aliased": [{"term": a.term, "depends_on": [list(d) for d in a.depends_on]} for a in result.aliased],
            "condition_number": result.condition_number,
            "digits": result.digits,
            "solver": result.solver,
            "refinement": result.refinement,
            "iterations": result.iterations,
            "source": result.source,
            "options": result.options,
            "warnings": result.warnings,
            "coding": _coding_doc(result.coding),
            **({"robust": result.robust} if result.robust else {}),
        },
        "accumulator": result.accumulator.to_state(),
    }


def save_model(result: FitResult, path: str | os.PathLike) -> None:
    """Write the model file atomically (temporary file, then rename)."""
    write_text_atomic(path, encode_json(model_to_dict(result)) + "\n")


def _check_version(doc: dict, where: str) -> None:
    version = doc.get("format_version")
    if not isinstance(version, int):
        raise ModelFileError(f"{where} has no valid format_version")
    if version > FORMAT_VERSION:
        raise ModelFileError(
            f"{where} is model format version {version}, written by tallfit "
            f"{doc.get('library_version', '?')}; this tallfit {__version__} reads versions up to "
            f"{FORMAT_VERSION}: upgrade tallfit to load it"
        )


def model_from_dict(doc: Any, where: str = "model") -> FitResult:
    if not isinstance(doc, dict) or doc.get("format") != FORMAT:
        raise ModelFileError(f"{where} is not a tallfit model file (no 'format': '{FORMAT}' field)")
    _check_version(doc, where)
    try:
        m = doc["model"]
        spec = ModelSpec.from_dict(m["spec"])
        fields = dict(m["inference"])
        for name in _ARRAYS:
            fields[name] = _floats(fields[name])
        for name, f in Inference.__dataclass_fields__.items():
            if name not in _ARRAYS and f.type in ("float", float):
                fields[name] = float(_floats(fields[name]))
        inference = Inference(**fields)
        acc_state = dict(doc["accumulator"])
        for key in ("col_min", "col_max"):
            acc_state[key] = _floats(acc_state[key])
        acc_state["R"] = [_floats(r) for r in acc_state["R"]]
        acc = FactorAccumulator.from_state(acc_state)
        aliased = [Alias(a["term"], [(str(t), float(c)) for t, c in a["depends_on"]]) for a in m["aliased"]]
        result = FitResult(
            spec=spec,
            terms=[str(t) for t in m["terms"]],
            inference=inference,
            aliased=aliased,
            accumulator=acc,
            condition_number=float(_floats(m["condition_number"])),
            digits=_floats(m["digits"]),
            solver=str(m["solver"]),
            refinement=m.get("refinement"),
            iterations=m.get("iterations"),
            source=m.get("source") or {},
            options=m.get("options") or {},
            warnings=[str(w) for w in m.get("warnings") or []],
            coding=_coding_doc(m.get("coding"), load=True),
            robust=_robust_from_doc(m.get("robust")),
        )
    except (KeyError, TypeError, ValueError) as exc:
        raise ModelFileError(f"{where} is damaged or incomplete ({type(exc).__name__}: {exc})") from None
    p = len(result.terms)
    if inference.estimate.shape != (p,) or inference.cov.shape != (p, p):
        raise ModelFileError(f"{where} is inconsistent: {p} terms but estimates of shape {inference.estimate.shape}")
    return result


def save_grouped(grouped, path: str | os.PathLike) -> None:
    """Write per-group models as one model file (every group with its own accumulator)."""
    doc = {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "library_version": __version__,
        "grouped": {
            "by": grouped.by,
            "failed": grouped.failed,
            "rows": grouped.rows,
            "options": grouped.options,
            "source": grouped.source,
            "n_read": grouped.n_read,
            "n_used": grouped.n_used,
            "dropped_by_column": grouped.dropped_by_column,
            "groups": {k: {key: v for key, v in model_to_dict(r).items() if key in ("model", "accumulator")}
                       for k, r in grouped.groups.items()},
        },
    }
    write_text_atomic(path, encode_json(doc) + "\n")


def _grouped_from_dict(doc: dict, where: str):
    from tallfit.grouped import GroupedFit

    g = doc["grouped"]
    try:
        groups = {
            str(k): model_from_dict({"format": FORMAT, "format_version": doc["format_version"], **v}, where)
            for k, v in g["groups"].items()
        }
        return GroupedFit(
            by=list(g["by"]), groups=groups, failed=dict(g.get("failed", {})), rows=dict(g.get("rows", {})),
            options=dict(g.get("options", {})), n_read=int(g.get("n_read", 0)), n_used=int(g.get("n_used", 0)),
            dropped_by_column=dict(g.get("dropped_by_column", {})), source=dict(g.get("source", {})),
        )
    except (KeyError, TypeError, ValueError) as exc:
        raise ModelFileError(f"{where} is damaged or incomplete ({type(exc).__name__}: {exc})") from None


def load_model(path: str | os.PathLike) -> FitResult:
    """Read a model file; a clear ModelFileError for anything that is not a valid model."""
    try:
        with open(path, encoding="utf-8") as fh:
            doc = json.load(fh)
    except FileNotFoundError:
        raise ModelFileError(f"model file {str(path)!r} does not exist") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ModelFileError(f"model file {str(path)!r} is not readable JSON ({exc})") from None
    where = f"model file {str(path)!r}"
    if isinstance(doc, dict) and "grouped" in doc and doc.get("format") == FORMAT:
        _check_version(doc, where)
        return _grouped_from_dict(doc, where)
    return model_from_dict(doc, where=where)
