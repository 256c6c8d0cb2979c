"""Heteroskedasticity-consistent and cluster-robust covariance from second-pass sums.

The sandwich V = (X'X)⁻¹ Ω (X'X)⁻¹ with Ω = Σ ωᵢ eᵢ² xᵢxᵢᵀ (White, Econometrica 48, 1980):
HC0 ωᵢ = 1, HC1 n/(n − p), HC2 1/(1 − hᵢ), HC3 1/(1 − hᵢ)² (MacKinnon & White, J. Econometrics
29, 1985), with leverage hᵢ = ‖R11⁻ᵀxᵢ‖². Everything is accumulated in the coordinates
zᵢ = R11⁻ᵀxᵢ, where the design is orthonormal (Σ zᵢzᵢᵀ = I): Ω_z = Σ ωᵢeᵢ²zᵢzᵢᵀ and
V = R11⁻¹ Ω_z R11⁻ᵀ, so (X'X)⁻¹ is never formed and the sums stay well scaled.

Clusters (CRV1, e.g. Cameron & Miller, J. Human Resources 50, 2015): score sums
s_c = Σ_{i∈c} zᵢeᵢ, Ω_z = Σ_c s_c s_cᵀ, times G/(G − 1)·(n − 1)/(n − p); memory O(G·p).
Two-way by keys A and B: V = V_A + V_B − V_{A∩B}, each term with its own factor (Cameron,
Gelbach & Miller, JBES 29, 2011); when that is not positive semi-definite, its negative
eigenvalues are set to zero as they propose (§2.3), and a note says so.

With an absorbed key (G levels swept out) the sums are those of the rows centred on their levels
(engine/absorbed_rows.py), which by Frisch–Waugh–Lovell give the slopes' block of the sandwich of
the fit with one indicator per level; its k = p + G parameters enter HC1's n/(n − k), the cluster
factor and the degrees of freedom, as statsmodels computes them for that fit; except that for
clusters the levels nest in (the absorbed key's own, and in two-way clustering the cells of its
pair with the other key) the cluster factor leaves G out of k, the usual choice there (Cameron & Miller 2015, §III.B, cited from
memory): each level's effect is estimated within one cluster, and counting G would inflate the
errors by √((n − p)/(n − p − G)), which for short panels is large.

Inference uses Student t with n − p degrees of freedom for HC0–HC3 and G − 1 for clusters
(min(G_A, G_B) − 1 for two-way), the choices statsmodels makes with ``use_t=True`` and its
default ``df_correction``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.linalg import solve_triangular

from tallfit.diagnostics.kernels import SCORES, SCORES_ALL, SCORES_HC2, SCORES_HC3, scatter_rows
from tallfit.errors import DesignError
from tallfit.kernels.products import gram as cross_products
from tallfit.solve.distributions import t_ppf, t_sf

KINDS = ("HC0", "HC1", "HC2", "HC3")
FEW_CLUSTERS = 50  # common practice: fewer than about 40-50 clusters make cluster errors unreliable
LEVERAGE_ONE = 1.0 - 1e-10  # a row with hᵢ this close to 1 alone determines a coefficient


# which sandwich rows the second pass sums for each choice (diagnostics.kernels.tile_scores)
_MODES = {"HC0": SCORES, "HC1": SCORES, "HC2": SCORES_HC2, "HC3": SCORES_HC3, "ALL": SCORES_ALL}
_GIVES = {SCORES: ("HC0", "HC1"), SCORES_HC2: ("HC2",), SCORES_HC3: ("HC3",), SCORES_ALL: KINDS}


@dataclass
class SandwichSums:
    """The Gram of the sandwich rows Vᵢ of the chosen estimator and Σ zᵢeᵢ (≈ 0 on the fitting data).

    With the scores wᵢ = eᵢzᵢ: for HC0/HC1 Vᵢ = wᵢ, for HC2 wᵢ/√(1 − hᵢ), for HC3 wᵢ/(1 − hᵢ), so
    V'V is that estimator's meat (sums of positive semi-definite terms: nothing cancels). For
    "all", Vᵢ = [wᵢ, dᵢwᵢ] with dᵢ = hᵢ/(1 − hᵢ): its blocks Σ wwᵀ, Σ d wwᵀ and Σ d² wwᵀ give HC0
    Σ wwᵀ, HC2 Σ (1 + d) wwᵀ and HC3 Σ (1 + d)² wwᵀ, at four times the cost of one."""

    p: int
    mode: int = SCORES_HC3
    n: float = 0  # rows (with frequency weights, their weight sum)
    gram: np.ndarray = None  # type: ignore[assignment]  # (p × p, or 2p × 2p for "all")
    score_sum: np.ndarray = None  # type: ignore[assignment]
    rss: float = 0.0
    max_leverage: float = 0.0

    @classmethod
    def create(cls, p: int, kind: str | None = None) -> "SandwichSums":
        mode = _MODES[(kind or "HC3").upper()]
        q = 2 * p if mode == SCORES_ALL else p
        return cls(p, mode, 0, np.zeros((q, q)), np.zeros(p))

    @property
    def kinds(self) -> tuple[str, ...]:
        """The estimators these sums give."""
        return _GIVES[self.mode]

    def add_rows(self, V: np.ndarray) -> None:
        """Fold a tile's sandwich rows (from kernels.tile_scores, which also adds to ``score_sum``)."""
        cross_products(V, out=self.gram)  # ≈ 3× faster than BLAS syrk on these shapes

    def add_residuals(self, e: np.ndarray, h: np.ndarray, count: float | None = None) -> None:
        """Count a block's rows: residuals e and leverages h (``count``: the rows they stand for,
        Σw with frequency weights)."""
        self.rss += float(e @ e)
        self.n += len(e) if count is None else count
        if len(h):
            self.max_leverage = max(self.max_leverage, float(h.max()))

    def _block(self, a: int, b: int) -> np.ndarray:
        p = self.p
        B = self.gram[a * p : (a + 1) * p, b * p : (b + 1) * p]
        return (B + B.T) / 2.0

    def meat(self, kind: str) -> np.ndarray:
        """Ω_z of HC0…HC3 (one of ``kinds``)."""
        kind = kind.upper()
        if kind not in self.kinds:
            raise ValueError(f"these sums give {', '.join(self.kinds)}, not {kind}")
        if self.mode != SCORES_ALL or kind in ("HC0", "HC1"):
            return self._block(0, 0)
        if kind == "HC2":
            return self._block(0, 0) + self._block(0, 1)
        return self._block(0, 0) + 2.0 * self._block(0, 1) + self._block(1, 1)

    def merge(self, other: "SandwichSums") -> "SandwichSums":
        return SandwichSums(
            self.p, self.mode, self.n + other.n, self.gram + other.gram, self.score_sum + other.score_sum,
            self.rss + other.rss, max(self.max_leverage, other.max_leverage),
        )

    def normal_equations_residual(self) -> float:
        """max |Σ zᵢeᵢ| / ‖e‖: rounding size on the data the model was fitted on, O(1) on other data."""
        norm = np.sqrt(self.rss)
        return float(np.max(np.abs(self.score_sum)) / norm) if norm > 0 else 0.0


@dataclass
class ClusterSums:
    """Score sums per cluster of one key (or one pair of keys), growing as new clusters appear."""

    name: str
    p: int
    S: np.ndarray = field(default=None)  # type: ignore[assignment]
    groups: int = 0

    def __post_init__(self) -> None:
        if self.S is None:
            self.S = np.zeros((1024, self.p), order="F")

    def _grow(self, groups: int) -> None:
        if groups > self.S.shape[0]:
            grown = np.zeros((max(groups, 2 * self.S.shape[0]), self.p), order="F")
            grown[: self.S.shape[0]] = self.S
            self.S = grown
        self.groups = max(self.groups, groups)

    def update(self, codes: np.ndarray, W: np.ndarray, groups: int) -> None:
        """Add the scores W (rows) to clusters ``codes`` (0 ≤ code < groups, groups so far)."""
        self._grow(groups)
        scatter_rows(np.ascontiguousarray(codes, dtype=np.int64), np.asfortranarray(W), self.S)

    def absorb(self, other: "ClusterSums", lut: np.ndarray, groups: int) -> None:
        """Add another part's sums; its cluster c is this one's lut[c] (distinct), ``groups`` in all."""
        self._grow(groups)
        self.S[lut[: other.groups]] += other.S[: other.groups]

    def meat(self) -> np.ndarray:
        S = self.S[: self.groups]
        return S.T @ S


def _bread(R11: np.ndarray) -> np.ndarray:
    return solve_triangular(R11, np.eye(R11.shape[0]))


def _sandwich(Rinv: np.ndarray, meat_z: np.ndarray) -> np.ndarray:
    V = Rinv @ meat_z @ Rinv.T
    return (V + V.T) / 2.0


def cluster_keys(cluster) -> list[str]:
    """The cluster key columns, each once; one or two (a clear error for more)."""
    keys = list(dict.fromkeys(cluster))
    if len(keys) > 2:
        raise DesignError(f"clustering takes one or two key columns, not {len(keys)} ({', '.join(keys)})")
    return keys


def check_kind(kind: str | None) -> None:
    """Fail before any pass on an unknown estimator name (None means the default, HC3; "all"
    computes the four, with HC3 as the headline)."""
    if kind is not None and str(kind).upper() not in _MODES:
        raise DesignError(f"unknown robust covariance {kind!r}: choose one of {', '.join(KINDS)} or all")


def hc_covariance(R11: np.ndarray, sums: SandwichSums, kind: str, swept: int = 0) -> np.ndarray:
    """HC0, HC1, HC2 or HC3 covariance of the coefficients (``swept``: levels of an absorbed key,
    parameters too: HC1's factor is n/(n − p − swept))."""
    kind = kind.upper()
    check_kind(kind)
    n, p = sums.n, sums.p
    if kind in ("HC2", "HC3") and sums.max_leverage >= LEVERAGE_ONE:
        return np.full((p, p), np.nan)
    V = _sandwich(_bread(R11), sums.meat(kind))
    return V * (n / (n - p - swept)) if kind == "HC1" else V


def one_way_factor(groups: int, n: int, k: int) -> float:
    """CRV1 small-sample factor G/(G − 1)·(n − 1)/(n − k), k parameters."""
    return groups / (groups - 1.0) * (n - 1.0) / (n - k)


def cluster_covariance(R11: np.ndarray, clusters: list[ClusterSums], n: int,
                       swept: int | Sequence[int] = 0) -> tuple[np.ndarray, list[str]]:
    """One-way (one ClusterSums) or two-way (A, B, A∩B) cluster-robust covariance, with notes;
    ``swept`` levels of an absorbed key count as parameters in the factor (one count for every
    term, or one per ClusterSums: 0 for clusters the levels are nested in)."""
    counts = [int(swept)] * len(clusters) if np.isscalar(swept) else [int(v) for v in swept]
    Rinv = _bread(R11)
    notes: list[str] = []
    k = R11.shape[0] + max(counts, default=0)
    if n <= k:
        raise DesignError(f"{n} rows for {k} parameters: clustered errors need more rows than parameters")
    for c in clusters:
        if c.groups < 2:
            raise DesignError(
                f"cluster column {c.name!r} has {c.groups} distinct value(s) in the used rows; "
                "clustered errors need at least 2 clusters (and about 50 to be reliable)"
            )

    def one(i: int) -> np.ndarray:
        c = clusters[i]
        return _sandwich(Rinv, c.meat()) * one_way_factor(c.groups, n, R11.shape[0] + counts[i])

    if len(clusters) == 1:
        V = one(0)
    elif len(clusters) == 3:
        a, b, ab = clusters
        V = one(0) + one(1) - one(2)
        w, Q = np.linalg.eigh(V)
        if w.min() < -1e-12 * max(abs(w.max()), np.finfo(float).tiny):
            notes.append(
                f"the two-way covariance by {a.name} and {b.name} had {int(np.sum(w < 0))} negative "
                "eigenvalue(s); they were set to zero (Cameron, Gelbach & Miller 2011, §2.3)"
            )
            V = (Q * np.maximum(w, 0.0)) @ Q.T
    else:  # pragma: no cover - the engine builds one or three
        raise ValueError("clusters must be one key, or two keys and their intersection")
    G = min(c.groups for c in clusters[:2])
    names = " and ".join(c.name for c in clusters[:2])
    if G < FEW_CLUSTERS:
        notes.append(
            f"only {G} clusters by {names}: with fewer than about 40-50 clusters (common practice) "
            "clustered standard errors are themselves unreliable and tend to be too small; read "
            "the p-values with caution (a wild cluster bootstrap is the usual remedy)"
        )
    return V, notes


def coefficient_table(beta: np.ndarray, V: np.ndarray, df: int, level: float) -> dict[str, Any]:
    """Standard errors, t, two-sided p and intervals (Student t on ``df``) from a covariance."""
    se = np.sqrt(np.maximum(np.diagonal(V), 0.0)) if np.all(np.isfinite(V)) else np.full(len(beta), np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = beta / se
    q = float(t_ppf(0.5 + level / 2.0, df))
    return {
        "std_error": se.tolist(),
        "t": t.tolist(),
        "p_value": (2.0 * t_sf(np.abs(t), df)).tolist(),
        "ci_low": (beta - q * se).tolist(),
        "ci_high": (beta + q * se).tolist(),
        "df": int(df),
        "covariance": V.tolist(),
    }


def robust_results(
    R11: np.ndarray,
    beta: np.ndarray,
    sums: SandwichSums,
    clusters: list[ClusterSums],
    *,
    selected: str | None,
    level: float,
    swept: int = 0,
    nested: Sequence[bool] = (),
) -> dict[str, Any]:
    """The ``robust`` value of a FitResult: the HC estimators the sums give, the clustered one if
    asked. ``swept``: levels of an absorbed key, parameters besides the p coefficients (as in a fit
    with one indicator column per level); ``nested``: per ClusterSums, whether those levels lie
    within its clusters (the key is the cluster key, or part of a pair), which leaves them out of
    that term's k."""
    n, p = sums.n, sums.p
    if n <= p + swept:
        raise DesignError(f"{n:g} rows for {p + swept} parameters: robust errors need more rows than parameters")
    estimators = {k: coefficient_table(beta, hc_covariance(R11, sums, k, swept), n - p - swept, level)
                  for k in sums.kinds}
    notes: list[str] = []
    if sums.max_leverage >= LEVERAGE_ONE and ({"HC2", "HC3"} & set(sums.kinds)):
        notes.append(
            "a row has leverage 1 (it alone determines a coefficient), so HC2 and HC3 are undefined; "
            "use HC0/HC1 or remove that row"
        )
    info: dict[str, Any] = {}
    if clusters:
        nested = list(nested) or [False] * len(clusters)
        V, cnotes = cluster_covariance(R11, clusters, n, [0 if inside else swept for inside in nested])
        notes.extend(cnotes)
        if any(nested) and swept:
            notes.append(
                f"the {swept:,} absorbed levels lie within the clusters, so the cluster factor "
                "(n − 1)/(n − k) leaves them out of k, as is usual for fixed effects nested in clusters "
                "(Cameron & Miller 2015, cited from memory); a fit with one indicator column per level "
                f"counts them, which would make these errors {np.sqrt((n - p) / (n - p - swept)):.4g}× larger"
            )
        key = "cluster:" + "+".join(c.name for c in clusters[:2])
        G = min(c.groups for c in clusters[:2])
        estimators[key] = coefficient_table(beta, V, G - 1, level)
        info = {c.name: int(c.groups) for c in clusters}
        selected = key  # clustered errors are also robust to unequal noise: they are the headline
    else:
        selected = (selected or "HC3").upper()
        selected = "HC3" if selected == "ALL" else selected
        if selected not in estimators:
            raise DesignError(f"unknown robust covariance {selected!r}: choose one of {', '.join(KINDS)}")
    return {
        "selected": selected,
        "conf_level": float(level),
        "n_used": int(round(n)),
        "max_leverage": float(sums.max_leverage),
        "clusters": info,
        "estimators": estimators,
        "notes": notes,
    }


def robust_for_model(model, sums: SandwichSums, clusters: list[ClusterSums], selected: str | None,
                     swept: int = 0) -> dict[str, Any]:
    """``robust_results`` for a fitted model, with the largest ratio of robust to plain errors
    (``swept``: the absorbed levels the pass used, SecondPass.levels_used)."""
    from tallfit.solve.exact import reduce_factor

    names = model.accumulator.names[:-1]  # the fitted design's columns, categorical indicators included
    cols = [names.index(t) for t in model.terms]
    p = len(cols)
    R11 = reduce_factor(model.accumulator.R, cols)[:p, :p]
    beta = np.asarray(model.inference.estimate, dtype=float)
    # the absorbed levels lie within the clusters of the absorbed key itself, and within the cells
    # of a pair that includes it (the pair's sums come last: engine/pass_sums.py)
    key = model.spec.absorb
    names = [c.name for c in clusters]
    nested = [bool(key) and (name == key or (i == 2 and key in names[:2])) for i, name in enumerate(names)]
    out = robust_results(R11, beta, sums, clusters, selected=selected, level=model.inference.conf_level,
                         swept=swept, nested=nested)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.asarray(out["estimators"][out["selected"]]["std_error"]) / model.inference.std_error
    out["terms"] = list(model.terms)
    out["max_ratio_to_plain"] = float(np.nanmax(ratio)) if np.isfinite(ratio).any() else float("nan")
    return out
