"""The factor pass on every core, and the choice between the stable factor and the Gram fast path.

``factor_pass`` folds the data into a FactorAccumulator with ``workers`` threads (parallel.py),
reusing block buffers and keeping blocks to a bounded size. ``method``:

- ``"qr"`` (default): Householder TSQR, accurate to about ε·κ.
- ``"gram"``: shifted co-moments merged pairwise (kernels/gram.py), faster, accurate to about
  ε·κ²; the fit keeps the Gram answer and says so when its estimated digits are few.
- ``"auto"``: the Gram pass first; when its estimate says it is unsafe (fewer than
  ``SAFE_DIGITS`` digits), a stable QR pass is run instead and the result says why.

The Gram path needs a plain numeric design (no categorical levels, weights, filters or fills);
otherwise the stable pass is used and the result says so.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from tallfit.accumulate.factor import FactorAccumulator
from tallfit.design.design import Design
from tallfit.design.spec import ModelSpec
from tallfit.engine.cluster import PART_READERS, current
from tallfit.engine.gram_accumulator import GramAccumulator
from tallfit.engine.parallel import (BufferPool, fold_round_robin, offset_progress, part_workers, read_part, run_tasks,
                                     source_parts, tree_merge, worker_count)
from tallfit.errors import DataSourceError
from tallfit.kernels.gram import SAFE_DIGITS

METHODS = ("qr", "gram", "auto")
#: Largest design block in bytes: wide designs read fewer rows per batch, so memory stays flat.
BLOCK_BYTES = 16 << 20
MIN_BLOCK_ROWS = 1024
#: From this many design columns on, one stream is folded by every worker by default (the fold,
#: not the decode, is then the slower side); narrower designs use one folder unless asked.
WIDE_K = 48
#: Spare rows per column of the QR pass's block buffers: with 2^16-row batches the columns would
#: lie a power of two apart and share cache sets while a tile is factored in place (measured at
#: k = 22: ≈ 80 → 71 ns per row with 64 spare rows).
QR_PAD_ROWS = 64


def check_method(method: str) -> str:
    m = str(method).strip().lower()
    if m not in METHODS:
        raise ValueError(f"method must be one of {', '.join(METHODS)}, not {method!r}")
    return m


def block_rows(batch_rows: int, k: int) -> int:
    """Rows per block: ``batch_rows``, fewer for wide designs (at most ``BLOCK_BYTES`` per block)."""
    return max(1, min(int(batch_rows), max(MIN_BLOCK_ROWS, BLOCK_BYTES // (8 * max(1, k)))))


@dataclass
class MethodReport:
    """What the method choice did, attached to the accumulator as ``method_report``."""

    requested: str
    used: str  # "gram" or "qr"
    gram: GramAccumulator | None = None
    notes: list[str] = field(default_factory=list)


def fold_pass(source, spec: ModelSpec, batch_rows: int, progress, design: Design | None, workers: int | None,
              make, fold, pad_rows: int = 0):
    """One pass with W workers; `make()` gives an empty accumulator, `fold(acc, block)` adds a block.

    ``pad_rows``: pooled block buffers get this many spare rows per column (see BufferPool)."""
    from tallfit.engine.local import design_blocks

    w = worker_count(workers)
    k = len(spec.term_names) + 1
    rows = block_rows(batch_rows, k)
    design = design or Design(spec)
    pool = BufferPool(pad_rows)

    def fold_and_return(acc, block) -> None:
        fold(acc, block)
        pool.give(block.A)

    parts = source_parts(source) if (design.plain and not spec.absorb) else None
    cluster = current()
    if parts is not None and cluster is not None:  # each part read and folded by a cluster worker
        return cluster.map_merge(fold_part, [sub for sub, _ in parts], lambda a, b: a.merge(b), "tree",
                                 progress=progress, places=parts, spec=spec, rows=rows, make=make, fold=fold,
                                 pad_rows=pad_rows, readers=PART_READERS)
    if parts is not None:
        import threading

        w = part_workers(workers, k)

        lock = threading.Lock()

        def task(sub, file_index: int):
            def run():
                return fold_part(sub, spec, rows, make, fold, pad_rows, readers=w, pool=pool,
                                 progress=offset_progress(progress, file_index, lock))
            return run

        accs = run_tasks([task(sub, i) for sub, i in parts], w)
    else:
        if workers is None and k < WIDE_K:
            w = 1  # narrow: one folder keeps up with the decoder, and one stream keeps its order
        blocks = design_blocks(source, spec, rows, progress, design=design, pool=pool)
        accs = fold_round_robin(blocks, w, make, fold_and_return)
    return tree_merge(accs, lambda a, b: a.merge(b))


def fold_part(sub, spec: ModelSpec, rows: int, make, fold, pad_rows: int = 0, readers: int = 1,
              pool: BufferPool | None = None, progress=None):
    """One part's accumulator: ``make()`` folded with every block of the part (``readers``: how
    many read parts at once, which sets the part's decoding threads and read-ahead; see
    engine.parallel.read_part)."""
    from tallfit.engine.local import design_blocks

    pool = pool or BufferPool(pad_rows)
    acc = make()
    for block in design_blocks(sub, spec, rows, progress, design=Design(spec), pool=pool,
                               prefetch=read_part(sub, readers)):
        fold(acc, block)
        pool.give(block.A)
    return acc


def factor_pass(source, spec: ModelSpec, batch_rows: int, progress, design: Design | None = None, *,
                workers: int | None = None, method: str = "qr") -> FactorAccumulator:
    """The factor of [X | y] over the source, by the chosen method (see the module doc)."""
    method = check_method(method)
    names = spec.term_names + [spec.target]
    design = design or Design(spec)

    def qr_pass() -> FactorAccumulator:
        return fold_pass(source, spec, batch_rows, progress, design, workers,
                         lambda: FactorAccumulator.create(names), _fold_factor, pad_rows=QR_PAD_ROWS)

    if method == "qr":
        return qr_pass()
    if not design.plain:
        acc = qr_pass()
        acc.method_report = MethodReport(method, "qr", notes=[
            f"method {method!r}: the Gram fast path handles plain numeric designs only; the stable "
            "Householder factor was used"])
        return acc
    g = fold_pass(source, spec, batch_rows, progress, design, workers,
                  lambda: GramAccumulator.create(names, spec.intercept),
                  lambda acc, b: acc.update_block(b))
    acc = g.to_factor()
    report = MethodReport(method, "gram", gram=g)
    safe, aliased = _verdict(g, acc) if acc.n_used > 0 else (True, False)
    if not safe and (method == "auto" or aliased):
        why = ("its estimate says it would keep fewer than "
               f"{SAFE_DIGITS:.0f} digits here (ill-conditioned design)") if not aliased else (
               "its factor is too inaccurate here to tell whether terms are aliased")
        try:
            acc = qr_pass()
        except DataSourceError as exc:
            report.notes.append(f"the Gram result looks unsafe but the data could not be read again ({exc})")
        else:
            report = MethodReport(method, "qr", gram=g, notes=[
                f"method {method!r}: the Gram fast path was not used because {why}; a second, "
                "stable pass (Householder factor) was made"])
    acc.method_report = report
    return acc



def _fold_factor(acc: FactorAccumulator, block) -> None:
    """Fold a block in place (its matrix goes back to the pool afterwards, unread)."""
    acc.update_block(block, overwrite=True)


def _verdict(g: GramAccumulator, acc: FactorAccumulator) -> tuple[bool, bool]:
    """(safe, aliases found) for a Gram pass: unsafe when few digits are left or a term looks aliased."""
    from tallfit.solve.exact import find_aliases

    keep, aliases = find_aliases(acc.R, acc.names)
    return (g.is_safe(keep) and not aliases), bool(aliases)


def apply_method_report(result, acc) -> None:
    """Carry a Gram pass's accuracy estimate, solver name and notes into a FitResult."""
    report = getattr(acc, "method_report", None)
    if report is None:
        return
    result.warnings.extend(report.notes)
    if report.used != "gram" or report.gram is None:
        return
    names = acc.names[:-1]
    keep = [names.index(t) for t in result.terms]
    digits = report.gram.digits(keep)
    if digits.size == np.asarray(result.digits).size:
        result.digits = np.minimum(np.asarray(result.digits, dtype=float), digits)
    result.solver = "gram-comoment"
    worst = float(digits.min()) if digits.size else 15.9
    if worst < SAFE_DIGITS:
        result.warnings.append(
            f"the Gram fast path keeps only about {worst:.0f} significant digits here (it loses "
            "about twice as many digits to ill-conditioning as the stable factor); refit with "
            "method 'qr' (--method qr) or 'auto' for an accurate answer")
