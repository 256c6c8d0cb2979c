"""Passes on a dask.distributed cluster (a LocalCluster of worker processes here): every part is
read and folded by a worker, the accumulators merged there in the local pass's order, so the
answer equals the local one bit for bit (the property checked here; the local passes are checked
against statsmodels and NIST elsewhere). Skipped when dask.distributed is not installed."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.csv  # noqa: F401  (pa.csv)
import pyarrow.parquet as pq
import pytest

import tallfit
from tallfit.engine.second_pass import second_pass
from tallfit.errors import DataSourceError, DesignError

distributed = pytest.importorskip("distributed", reason="dask.distributed is not installed (tallfit[cluster])")


@pytest.fixture(scope="module")
def client():
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       dashboard_address=None, silence_logs=50)
    c = distributed.Client(cluster)
    yield c
    c.close()
    cluster.close()


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    """Invented telemetry in two files of several row groups (parts of ≥ 2^18 rows each)."""
    rng = np.random.default_rng(3)
    folder = tmp_path_factory.mktemp("fleet")
    for f in range(2):
        n = 600_000
        cpu = rng.uniform(0, 1, n)
        temp = rng.normal(24, 3, n)
        host = rng.integers(0, 300, n)
        zone = rng.choice(["z1", "z2", "z3"], n)
        power = 110 + 170 * cpu + 2.5 * temp + 4 * (zone == "z2") + rng.normal(0, 3, 300)[host] + rng.normal(0, 4, n)
        t = pa.table({"cpu_util": cpu, "inlet_temp_c": temp, "host_id": [f"h{h:03d}" for h in host],
                      "zone": zone, "power_w": power})
        pq.write_table(t, folder / f"part-{f}.parquet", row_group_size=100_000)
    return str(folder / "*.parquet")


FEATS = ["cpu_util", "inlet_temp_c"]


@pytest.mark.parametrize("opts", [{}, {"method": "gram"}, {"categorical": ["zone"]},
                                  {"absorb": "host_id", "categorical": ["zone"]}])
def test_fit_on_the_cluster_equals_the_local_fit(fleet, client, opts):
    here = tallfit.fit(fleet, "power_w", FEATS, **opts)
    there = tallfit.fit(fleet, "power_w", FEATS, scheduler=client, **opts)
    assert there.options["cluster"]["parts"] >= 2
    np.testing.assert_array_equal(there.inference.estimate, here.inference.estimate)
    np.testing.assert_array_equal(there.inference.std_error, here.inference.std_error)
    assert there.inference.n_used == here.inference.n_used == 1_200_000
    assert not any("nothing ran on the cluster" in w for w in there.warnings)
    assert "read on the dask cluster" in there.summary()


def test_second_pass_on_the_cluster_equals_the_local_pass(fleet, client):
    from tallfit.engine.cluster import on_cluster

    model = tallfit.fit(fleet, "power_w", FEATS)
    here = second_pass(model, fleet, cluster=["host_id"], keep=["host_id"], robust="all")
    with on_cluster(client) as run:
        there = second_pass(model, fleet, cluster=["host_id"], keep=["host_id"], robust="all")
    assert run.parts >= 2
    np.testing.assert_array_equal(there.sandwich.gram, here.sandwich.gram)
    np.testing.assert_array_equal(there.clusters[0].S[: there.clusters[0].groups],
                                  here.clusters[0].S[: here.clusters[0].groups])
    np.testing.assert_array_equal(there.feature_bins.sums, here.feature_bins.sums)
    np.testing.assert_array_equal(there.heat, here.heat)
    assert there.top_residuals.to_list() == here.top_residuals.to_list()
    fitted = tallfit.fit(fleet, "power_w", FEATS, absorb="host_id", robust="HC1", scheduler=client)
    np.testing.assert_array_equal(fitted.robust["estimators"]["HC1"]["std_error"],
                                  tallfit.fit(fleet, "power_w", FEATS, absorb="host_id",
                                              robust="HC1").robust["estimators"]["HC1"]["std_error"])


def test_cluster_reports_what_it_could_not_send_and_bad_addresses(fleet, client, tmp_path, monkeypatch):
    import tallfit.engine.cluster as cl

    monkeypatch.setattr(cl, "CONNECT_SECONDS", 2)
    table = pq.read_table(fleet.replace("*", "part-0"))
    m = tallfit.fit(table.slice(0, 1000), "power_w", FEATS, scheduler=client)
    assert any("nothing ran on the cluster" in w for w in m.warnings)
    with pytest.raises(DataSourceError, match="cannot reach the dask scheduler"):
        tallfit.fit(fleet, "power_w", FEATS, scheduler="tcp://127.0.0.1:1")
    with pytest.raises(DesignError, match="scheduler must be"):
        tallfit.fit(fleet, "power_w", FEATS, scheduler=42)
    bad = tmp_path / "bad"
    bad.mkdir()
    t = table.slice(0, 300_000)
    pq.write_table(t, bad / "a.parquet", row_group_size=100_000)
    pq.write_table(t.set_column(0, "cpu_util", pa.array(["x"] * t.num_rows)), bad / "b.parquet")
    with pytest.raises(tallfit.errors.TallfitError, match="b.parquet"):  # a worker's error, as it would be here
        tallfit.fit(str(bad / "*.parquet"), "power_w", FEATS, scheduler=client)


def test_cli_fit_and_report_on_the_cluster(fleet, client, tmp_path, capsys, monkeypatch):
    """fit --scheduler ADDRESS (the test cluster's own scheduler) writes the local model; report
    --scheduler too; an unreachable scheduler is exit 2 with nothing written."""
    import tallfit.engine.cluster as cl
    from tallfit.cli import main

    address = client.scheduler.address
    out = tmp_path / "m.json"
    assert main(["fit", fleet, "--target", "power_w", "--features", "cpu_util,inlet_temp_c", "--scheduler", address,
                 "--out", str(out), "--no-progress"]) == 0
    assert "read on the dask cluster" in capsys.readouterr().out
    here = tallfit.fit(fleet, "power_w", FEATS)
    np.testing.assert_array_equal(tallfit.load(out).inference.estimate, here.inference.estimate)
    assert main(["report", str(out), fleet, "--out", str(tmp_path / "r.html"), "--scheduler", address,
                 "--no-progress", "--no-images"]) == 0
    assert (tmp_path / "r.html").exists()
    monkeypatch.setattr(cl, "CONNECT_SECONDS", 1)
    bad = tmp_path / "never.json"
    assert main(["fit", fleet, "--target", "power_w", "--features", "cpu_util", "--scheduler", "tcp://127.0.0.1:1",
                 "--out", str(bad), "--no-progress"]) == 2
    assert "cannot reach the dask scheduler" in capsys.readouterr().err and not bad.exists()


def test_validation_on_the_cluster_equals_the_local_split(fleet, client):
    """The fold and holdout pass: rows keep their scan positions on the workers, so every fold's
    factor, the CV error and the holdout error are the local ones, bit for bit."""
    from tallfit.api import validate

    here = validate(fleet, "power_w", FEATS, folds=5, holdout=0.2, ridge="auto")
    there = validate(fleet, "power_w", FEATS, folds=5, holdout=0.2, ridge="auto", scheduler=client)
    assert there.fit.options["cluster"]["parts"] >= 2
    a, b = here.to_dict(), there.to_dict()
    for key in ("cv", "holdout", "ridge"):
        assert a[key] == b[key] and a[key] is not None
    np.testing.assert_array_equal(there.fit.inference.estimate, here.fit.inference.estimate)


def test_progress_counts_every_part_as_it_finishes(fleet, client, tmp_path):
    """The progress hook hears of each part once it is done: all rows, Parquet (footer counts)
    and CSV files (the count the part's result holds)."""
    seen = []
    tallfit.fit(fleet, "power_w", FEATS, scheduler=client, progress=lambda n, i: seen.append((n, i)))
    assert sum(n for n, _ in seen) == 1_200_000 and {i for _, i in seen} == {0, 1}
    t = pq.read_table(fleet.replace("*", "part-0")).slice(0, 5000)
    for k in range(2):
        pa.csv.write_csv(t, tmp_path / f"d{k}.csv")
    seen.clear()
    tallfit.fit(str(tmp_path / "*.csv"), "power_w", FEATS, scheduler=client, progress=lambda n, i: seen.append((n, i)))
    assert sorted(seen) == [(5000, 0), (5000, 1)]


def test_predictions_on_the_cluster_equal_the_local_file(fleet, client, tmp_path, capsys):
    """predict --scheduler: each part scored by a worker into a staging file, joined in order into
    the output: the same rows, columns and numbers as the local run, and no staging file left."""
    from tallfit.cli import main

    model = tallfit.fit(fleet, "power_w", FEATS, categorical=["zone"])
    here = tallfit.predict(model, fleet, out=tmp_path / "here.parquet", intervals=True, passthrough=["host_id"])
    there = tallfit.predict(model, fleet, out=tmp_path / "there.parquet", intervals=True, passthrough=["host_id"],
                            scheduler=client)
    assert there.cluster["parts"] >= 2 and there.rows == here.rows == 1_200_000
    assert there.rows_outside_training_range == here.rows_outside_training_range
    assert pq.read_table(tmp_path / "there.parquet").equals(pq.read_table(tmp_path / "here.parquet"))
    model.save(tmp_path / "m.json")
    assert main(["predict", str(tmp_path / "m.json"), fleet, "--out", str(tmp_path / "p.csv"), "--scheduler",
                 client.scheduler.address, "--no-progress"]) == 0
    assert "scored on the dask cluster" in capsys.readouterr().out
    assert pa.csv.read_csv(tmp_path / "p.csv").num_rows == 1_200_000
    assert sorted(p.name for p in tmp_path.iterdir()) == ["here.parquet", "m.json", "p.csv", "there.parquet"]


def _grunfeld_in_four_files(folder):
    """grunfeld (statsmodels ships it) with an era column, written as four Parquet files."""
    sm = pytest.importorskip("statsmodels.api")
    d = sm.datasets.grunfeld.load_pandas().data
    d["era"] = np.where(d.year < 1945, "early", "late")
    table = pa.table({"invest": d.invest.to_numpy(float), "value": d.value.to_numpy(float),
                      "capital": d.capital.to_numpy(float), "firm": d.firm.astype(str).to_numpy(),
                      "era": d.era.to_numpy()})
    for k in range(4):
        pq.write_table(table.slice(55 * k, 55), folder / f"g{k}.parquet")
    return sm, d, table


def test_per_group_models_on_the_cluster(client, tmp_path):
    """fit --by on the cluster: each part's group factors on a worker, merged part after part:
    every group's model equals the one-stream fit (to rounding) and statsmodels on that group's
    rows of grunfeld (statsmodels ships it), a categorical's levels met in different parts included."""
    sm, d, table = _grunfeld_in_four_files(tmp_path)
    there = tallfit.fit(str(tmp_path / "*.parquet"), "invest", ["value", "capital"], categorical=["firm"], by="era",
                        scheduler=client)
    here = tallfit.fit(table, "invest", ["value", "capital"], categorical=["firm"], by="era")
    assert set(there.groups) == set(here.groups) == {"early", "late"}
    for key in ("early", "late"):
        a, b = there.groups[key], here.groups[key]
        assert a.terms == b.terms and a.options["cluster"]["parts"] == 4
        np.testing.assert_allclose(a.inference.estimate, b.inference.estimate, rtol=1e-10)
        rows = d[d.era == key]
        firms = [t.split("[")[1].rstrip("]") for t in a.terms if t.startswith("firm[")]
        X = np.column_stack([np.ones(len(rows)), rows.value, rows.capital]
                            + [(rows.firm.to_numpy() == f).astype(float) for f in firms])
        np.testing.assert_allclose(a.inference.std_error, sm.OLS(rows.invest.to_numpy(float), X).fit().bse, rtol=1e-8)
    assert there.n_read == here.n_read == len(d)


def test_per_group_robust_errors_on_the_cluster(client, tmp_path):
    """fit --by --robust --cluster on the cluster: each part's group sums on a worker, merged part
    after part; HC3 and firm-clustered errors per era equal statsmodels on that era's rows of
    grunfeld."""
    sm, d, table = _grunfeld_in_four_files(tmp_path)
    data = str(tmp_path / "*.parquet")
    hc3 = tallfit.fit(data, "invest", ["value", "capital"], by="era", robust="HC3", scheduler=client)
    cl = tallfit.fit(data, "invest", ["value", "capital"], by="era", cluster="firm", scheduler=client)
    for key in ("early", "late"):
        rows = d[d.era == key]
        ols = sm.OLS(rows.invest.to_numpy(float), sm.add_constant(rows[["value", "capital"]].to_numpy(float)))
        np.testing.assert_allclose(hc3.groups[key].robust["estimators"]["HC3"]["std_error"],
                                   ols.fit(cov_type="HC3").bse, rtol=1e-9)
        ref = ols.fit(cov_type="cluster", cov_kwds={"groups": rows.firm.factorize()[0]})
        np.testing.assert_allclose(cl.groups[key].robust["estimators"]["cluster:firm"]["std_error"], ref.bse,
                                   rtol=1e-9)
        assert hc3.groups[key].options["cluster"]["passes"] == 2
    # checking every group at once reads here and says so; its numbers are the local ones
    from tallfit.api import diagnose

    there = diagnose(hc3, data, scheduler=client)
    here = diagnose(tallfit.fit(data, "invest", ["value", "capital"], by="era"), data)
    for key in ("early", "late"):
        m = there["groups"][key]["model"]
        assert any("checking every group at once reads the data here" in w for w in m.warnings)
        np.testing.assert_allclose(m.robust["estimators"]["HC3"]["std_error"],
                                   here["groups"][key]["model"].robust["estimators"]["HC3"]["std_error"], rtol=1e-12)


def test_a_file_the_workers_cannot_open_is_named(client, tmp_path):
    """A part whose file a worker cannot open: the error names the file and says the workers
    must reach it (here the file is removed after the parts were planned)."""
    import tallfit.engine.passes as passes

    rng = np.random.default_rng(1)
    tab = pa.table({"cpu_util": rng.uniform(size=600_000), "inlet_temp_c": rng.normal(size=600_000),
                    "power_w": rng.normal(size=600_000)})
    for k in range(2):
        pq.write_table(tab, tmp_path / f"f{k}.parquet", row_group_size=100_000)
    real = passes.source_parts

    def then_remove(source, *a, **k):
        parts = real(source, *a, **k)
        (tmp_path / "f1.parquet").unlink()
        return parts

    passes.source_parts = then_remove
    try:
        with pytest.raises(DataSourceError, match=r"f1.parquet.*every worker must reach the files"):
            tallfit.fit(str(tmp_path / "*.parquet"), "power_w", FEATS, scheduler=client)
    finally:
        passes.source_parts = real


def test_refinement_passes_on_the_cluster(client, tmp_path):
    """fit --refine on the cluster: each refinement pass's double-double residual products are made
    per part on the workers and merged in part order; the refined fit equals the local one to the
    last digits and statsmodels OLS on grunfeld (statsmodels ships it), and every pass ran there."""
    sm, d, table = _grunfeld_in_four_files(tmp_path)
    data = str(tmp_path / "*.parquet")
    there = tallfit.fit(data, "invest", ["value", "capital"], refine=2, scheduler=client)
    here = tallfit.fit(data, "invest", ["value", "capital"], refine=2)
    assert there.solver == here.solver == "householder-tsqr+refinement"
    np.testing.assert_allclose(there.inference.estimate, here.inference.estimate, rtol=1e-14)
    ref = sm.OLS(d.invest.to_numpy(float), sm.add_constant(d[["value", "capital"]].to_numpy(float))).fit()
    np.testing.assert_allclose(there.inference.estimate, ref.params, rtol=1e-10)
    assert there.options["cluster"]["passes"] == 3 and there.options["cluster"]["parts"] == 3 * 4  # parts of every pass


def test_an_iterative_solver_with_a_cluster_says_where_its_passes_ran(client, tmp_path):
    sm, d, table = _grunfeld_in_four_files(tmp_path)
    r = tallfit.fit(str(tmp_path / "*.parquet"), "invest", ["value", "capital"], solver="cg", scheduler=client)
    assert any("passes read the data here, not on the cluster" in w for w in r.warnings)
    assert r.options["cluster"]["passes"] == 1  # the factor pass
