"""``tallfit demo``: the whole job on generated fleet telemetry, end to end.

Generates power telemetry for a server fleet (synthetic_gen), fits power draw on the numeric
telemetry in one streamed pass, saves and shows the model, compares the estimates with the
coefficients the data were generated from, and scores a fresh day of rows.
"""

from __future__ import annotations

import sys
from pathlib import Path

from tallfit.render.numbers import sig


def run_demo(directory: str, rows: int = 400_000, seed: int = 7, progress: bool = True, out=None) -> int:
    import synthetic_gen

    from tallfit.api import fit, predict
    from tallfit.progress import ScanProgress
    from tallfit.inputs import as_source

    out = out or sys.stdout
    root = Path(directory)
    root.mkdir(parents=True, exist_ok=True)
    data_dir, new_dir = root / "telemetry", root / "new-rows"
    print(f"generating {rows:,} rows of fleet telemetry into {data_dir} ...", file=out)
    truth = synthetic_gen.generate(data_dir, rows, seed=seed, files=4, overwrite=True)
    synthetic_gen.generate(new_dir, max(1000, rows // 100), seed=seed + 1, overwrite=True)
    features = list(synthetic_gen.FEATURES)
    target = synthetic_gen.TARGET
    cmd = f"tallfit fit {data_dir} --target {target} --features {','.join(features)} --out {root / 'model.json'}"
    print(f"fitting, as with:\n  {cmd}\n", file=out)
    source = as_source(str(data_dir))
    with ScanProgress(source, enabled=None if progress else False) as prog:
        model = fit(source, target, features, progress=prog)
    model.save(root / "model.json")
    out.write(model.summary())

    print("\ncompared with the coefficients the demo data were generated from", file=out)
    true = dict(truth["coefficients"])
    inf = model.inference
    w = max(len(t) for t in model.terms)
    inside = 0
    for i, term in enumerate(model.terms):
        key = "intercept" if term == "(intercept)" else term
        hit = inf.ci_low[i] <= true[key] <= inf.ci_high[i]
        inside += hit
        mark = "inside" if hit else "OUTSIDE"
        print(f"  {term.ljust(w)}  true {sig(true[key]).rjust(9)}  estimate {sig(inf.estimate[i]).rjust(11)}  {mark} the interval", file=out)
    print(f"  {inside} of {len(model.terms)} intervals hold the true value (about 95% expected)", file=out)

    pred_path = root / "predictions.parquet"
    new_source = as_source(str(new_dir))
    report = predict(model, new_source, out=pred_path, intervals=True, passthrough=["host_id", "ts"])
    print(f"\nscored {report.rows:,} new rows into {pred_path} (columns: {', '.join(report.columns)})", file=out)
    for note in report.warnings():
        print(f"note: {note}", file=out)
    print(f"\nnext: tallfit show {root / 'model.json'} --json", file=out)
    return 0
