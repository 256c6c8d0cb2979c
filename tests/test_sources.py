"""Chunked readers (tallfit.sources): round trips, partitions, globs, compression, errors, memory bound.

Expected values always come from an independent reader of the same bytes: pyarrow.parquet /
pyarrow.feather for binary files, Python's csv and json modules for text files, gzip / zstandard for
compressed files, os.stat for sizes.
"""

from __future__ import annotations

import csv
import gzip
import json
import os

import numpy as np
import pyarrow as pa
import pyarrow.feather as feather
import pyarrow.parquet as pq
import pytest
import zstandard

from tallfit.errors import ColumnNotFoundError, DataSourceError, SchemaError, TallfitError
from tallfit.sources import Chunk, FileInfo, IterableSource, Source, open_source

FORMATS = ["parquet", "csv", "jsonl", "ipc"]
EXT = {"parquet": "parquet", "csv": "csv", "jsonl": "jsonl", "ipc": "arrow"}


def telemetry(n: int, seed: int = 0) -> pa.Table:
    """Invented server telemetry: a few metrics, a machine class and the power draw."""
    rng = np.random.default_rng(seed)
    return pa.table({
        "cpu_load": np.round(rng.uniform(0, 100, n), 3),
        "fan_rpm": rng.integers(800, 4000, n),
        "machine_class": rng.choice(["compute", "storage", "edge"], n),
        "inlet_temp": np.round(rng.normal(24, 3, n), 2),
        "power_w": np.round(rng.normal(300, 40, n), 1),
    })


def write(table: pa.Table, path, fmt: str) -> str:
    """Write with each format's own library writer (or the stdlib for text)."""
    path = str(path)
    if fmt == "parquet":
        pq.write_table(table, path)
    elif fmt == "ipc":
        feather.write_feather(table, path)
    elif fmt == "csv":
        with open(path, "w", newline="") as f:
            w = csv.writer(f)
            w.writerow(table.column_names)
            w.writerows(zip(*(table.column(c).to_pylist() for c in table.column_names)))
    else:
        with open(path, "w") as f:
            for row in table.to_pylist():
                f.write(json.dumps(row) + "\n")
    return path


def reference(path: str, fmt: str) -> dict[str, list]:
    """Columns as read by a reader independent of tallfit."""
    if fmt == "parquet":
        return pq.read_table(path).to_pydict()              # reference: pyarrow.parquet.read_table
    if fmt == "ipc":
        return feather.read_table(path).to_pydict()         # reference: pyarrow.feather.read_table
    if fmt == "csv":
        with open(path, newline="") as f:                   # reference: Python's csv module
            rows = list(csv.DictReader(f))
        return {k: [_num(r[k]) for r in rows] for k in rows[0]}
    with open(path) as f:                                   # reference: Python's json module
        rows = [json.loads(line) for line in f if line.strip()]
    return {k: [r.get(k) for r in rows] for k in rows[0]}


def _num(text: str):
    try:
        return float(text)
    except ValueError:
        return text


def collect(chunks) -> tuple[dict[str, list], list[Chunk]]:
    chunks = list(chunks)
    out: dict[str, list] = {}
    for ch in chunks:
        for k, v in ch.batch.to_pydict().items():
            out.setdefault(k, []).extend(v)
    return out, chunks


# --------------------------------------------------------------------------- round trips

@pytest.mark.parametrize("fmt", FORMATS)
@pytest.mark.parametrize("batch_rows", [1, 3, 7, 100_000])
def test_round_trip_columns_batches_offsets(tmp_path, fmt, batch_rows):
    path = write(telemetry(23), tmp_path / f"fleet.{EXT[fmt]}", fmt)
    src = open_source(path)
    assert isinstance(src, Source) and src.format == fmt
    assert src.files == [FileInfo(path, os.path.getsize(path), fmt, {})]  # size reference: os.path.getsize
    cols = ["power_w", "machine_class", "cpu_load"]
    got, chunks = collect(src.batches(cols, batch_rows=batch_rows))
    ref = reference(path, fmt)
    assert list(got) == cols
    for c in cols:
        assert got[c] == ref[c]
    for ch in chunks:
        assert ch.batch.schema.names == cols                   # only the requested columns, in order
        assert 1 <= ch.batch.num_rows <= batch_rows
        assert ch.file_index == 0
    assert [ch.row_start for ch in chunks] == list(np.cumsum([0] + [c.batch.num_rows for c in chunks])[:-1])
    assert pa.types.is_floating(src.schema.field("power_w").type)
    fan = src.schema.field("fan_rpm").type
    assert pa.types.is_integer(fan) or pa.types.is_floating(fan)


@pytest.mark.parametrize("fmt", FORMATS)
def test_multi_file_order_kept(tmp_path, fmt):
    paths = [write(telemetry(5 + k, seed=k), tmp_path / f"day{k}.{EXT[fmt]}", fmt) for k in range(3)]
    order = [paths[2], paths[0], paths[1]]
    src = open_source(order)
    assert [f.path for f in src.files] == order
    got, chunks = collect(src.batches(["inlet_temp"], batch_rows=4))
    expected = [v for p in order for v in reference(p, fmt)["inlet_temp"]]
    assert got["inlet_temp"] == expected
    for i, p in enumerate(order):
        mine = [ch for ch in chunks if ch.file_index == i]
        assert sum(ch.batch.num_rows for ch in mine) == len(reference(p, fmt)["inlet_temp"])
        assert mine[0].row_start == 0


@pytest.mark.parametrize("fmt", ["csv", "jsonl"])
@pytest.mark.parametrize("engine", ["polars", "pyarrow", "pyarrow-stream"])
def test_text_engines_agree_with_stdlib(tmp_path, fmt, engine):
    path = write(telemetry(40), tmp_path / f"fleet.{EXT[fmt]}", fmt)
    src = open_source(path)
    src._use_engine(engine)
    got, _ = collect(src.batches(["cpu_load", "fan_rpm", "machine_class"], batch_rows=9))
    ref = reference(path, fmt)
    for c in got:
        assert got[c] == ref[c]


def test_zero_columns_still_counts_rows(tmp_path):
    path = write(telemetry(17), tmp_path / "fleet.csv", "csv")
    chunks = list(open_source(path).batches([], batch_rows=5))
    assert sum(ch.batch.num_rows for ch in chunks) == len(reference(path, "csv")["cpu_load"])
    assert all(ch.batch.num_columns == 0 for ch in chunks)


# --------------------------------------------------------------------------- discovery

def test_hive_directory_partitions_and_ignored_files(tmp_path):
    root = tmp_path / "fleet"
    expected = []
    for region in ["eu", "us"]:
        for rack in [3, 12]:
            d = root / f"region={region}" / f"rack={rack}"
            d.mkdir(parents=True)
            p = write(telemetry(4, seed=rack), d / "part-0.parquet", "parquet")
            expected.append((p, region, rack))
    (root / "_SUCCESS").write_text("")
    (root / "region=eu" / ".part-0.parquet.crc").write_text("x")
    (root / "_temporary").mkdir()
    write(telemetry(2), root / "_temporary" / "junk.parquet", "parquet")
    src = open_source(root)
    assert [f.path for f in src.files] == [e[0] for e in expected]
    assert src.files[0].partition == {"region": "eu", "rack": "3"}
    assert src.schema.field("region").type == pa.string()
    assert src.schema.field("rack").type == pa.int64()      # plainly integer partition values
    got, chunks = collect(src.batches(["rack", "power_w", "region"], batch_rows=3))
    assert got["region"] == [e[1] for e in expected for _ in range(4)]
    assert got["rack"] == [e[2] for e in expected for _ in range(4)]
    assert got["power_w"] == [v for e in expected for v in pq.read_table(e[0])["power_w"].to_pylist()]
    assert "partitioned by region, rack" in src.describe()


def test_glob_patterns(tmp_path):
    (tmp_path / "a").mkdir()
    for name in ["day1.csv", "day2.csv", "a/day3.csv"]:
        write(telemetry(3), tmp_path / name, "csv")
    (tmp_path / "notes.md").write_text("not data")
    flat = open_source(str(tmp_path / "day*.csv"))
    assert [os.path.basename(f.path) for f in flat.files] == ["day1.csv", "day2.csv"]
    deep = open_source(str(tmp_path / "**" / "*.csv"))
    assert sorted(os.path.basename(f.path) for f in deep.files) == ["day1.csv", "day2.csv", "day3.csv"]
    one = open_source(str(tmp_path / "day?.csv"))
    assert len(one.files) == 2


def test_file_uri(tmp_path):
    path = write(telemetry(6), tmp_path / "fleet.parquet", "parquet")
    src = open_source("file://" + os.path.abspath(path))
    got, _ = collect(src.batches(["cpu_load"]))
    assert got["cpu_load"] == reference(path, "parquet")["cpu_load"]
    assert src.fingerprint()["total_bytes"] == os.stat(path).st_size       # reference: os.stat
    globbed = open_source("file://" + os.path.abspath(tmp_path) + "/*.parquet")
    assert len(globbed.files) == 1


@pytest.mark.parametrize("suffix,opener", [
    (".csv.gz", lambda p: gzip.open(p, "wb")),                               # reference: gzip module
    (".csv.zst", lambda p: zstandard.ZstdCompressor().stream_writer(open(p, "wb"))),  # reference: zstandard
])
def test_compressed_csv(tmp_path, suffix, opener):
    plain = write(telemetry(50), tmp_path / "plain.csv", "csv")
    packed = str(tmp_path / f"fleet{suffix}")
    with open(plain, "rb") as f, opener(packed) as out:
        out.write(f.read())
    got, _ = collect(open_source(packed).batches(["power_w", "machine_class"], batch_rows=8))
    ref = reference(plain, "csv")
    assert got["power_w"] == ref["power_w"] and got["machine_class"] == ref["machine_class"]


@pytest.mark.parametrize("name,delimiter", [("fleet.tsv", ","), ("fleet.csv", ";"), ("fleet.txt", "\t")])
def test_delimiters(tmp_path, name, delimiter):
    sep = "\t" if name.endswith(".tsv") else delimiter
    rows = [["cpu_load", "power_w", "rack"], ["1.5", "200.25", "r,1"], ["2.5", "210.5", "r;2"], ["", "NA", "r3"]]
    path = tmp_path / name
    with open(path, "w", newline="") as f:
        csv.writer(f, delimiter=sep).writerows(rows)
    got, _ = collect(open_source(str(path), delimiter=delimiter).batches(["cpu_load", "power_w", "rack"]))
    # reference: the rows as written by Python's csv module; '' and 'NA' read as missing
    assert got == {"cpu_load": [1.5, 2.5, None], "power_w": [200.25, 210.5, None], "rack": ["r,1", "r;2", "r3"]}


def test_missing_markers_are_null(tmp_path):
    path = tmp_path / "m.csv"
    path.write_text("cpu_load,machine_class\n1,edge\n,\nNA,NA\nnull,x\nNaN,y\n2.5,z\n")
    got, _ = collect(open_source(str(path)).batches(["cpu_load", "machine_class"]))
    assert got["cpu_load"] == [1.0, None, None, None, None, 2.5]
    assert got["machine_class"] == ["edge", None, None, "x", "y", "z"]
    jpath = tmp_path / "m.jsonl"
    jpath.write_text('{"cpu_load": 1}\n{"cpu_load": "NA"}\n{"cpu_load": NaN}\n{"cpu_load": null}\n{"x": 1}\n')
    got, _ = collect(open_source(str(jpath)).batches(["cpu_load"]))
    assert got["cpu_load"] == [1.0, None, None, None, None]


def test_quoted_newlines_across_blocks(tmp_path):
    path = tmp_path / "notes.csv"
    rows = [["rack", "note", "power_w"]]
    rows += [[f"r{i}", f"line one, {i}\nline \"two\"" if i % 3 else "", f"{i}.5"] for i in range(6000)]
    with open(path, "w", newline="") as f:
        csv.writer(f).writerows(rows)
    assert os.path.getsize(path) > 3 * (64 << 10)           # several blocks at the smallest block size
    for engine in ["pyarrow", "polars"]:
        src = open_source(str(path))
        src._use_engine(engine)
        got, chunks = collect(src.batches(["note", "power_w"], batch_rows=50))
        with open(path, newline="") as f:                      # reference: Python's csv module
            ref = list(csv.DictReader(f))
        assert got["note"] == [r["note"] or None for r in ref]
        assert got["power_w"] == [float(r["power_w"]) for r in ref]


def test_header_only_and_missing_column_in_one_file(tmp_path):
    empty = tmp_path / "a.csv"
    empty.write_text("cpu_load,power_w\n")
    src = open_source(str(empty))
    assert src.schema.names == ["cpu_load", "power_w"]
    assert list(src.batches(["power_w"])) == []
    full = tmp_path / "b.csv"
    full.write_text("cpu_load,power_w\n1,2\n")
    short = tmp_path / "c.csv"
    short.write_text("cpu_load\n3\n")
    with pytest.raises(ColumnNotFoundError, match="c.csv"):
        list(open_source([str(full), str(short)]).batches(["power_w"]))
    j1, j2 = tmp_path / "a.jsonl", tmp_path / "b.jsonl"
    j1.write_text('{"cpu_load": 1, "power_w": 2}\n')
    j2.write_text('{"cpu_load": 3}\n')                       # JSON lines: an absent key is a missing value
    got, _ = collect(open_source([str(j1), str(j2)]).batches(["power_w"]))
    assert got["power_w"] == [2.0, None]


def test_truncated_text_files_name_file_and_row(tmp_path):
    body = "cpu_load,power_w\n" + "".join(f"{i * 0.37:.4f},{i * 1.91:.4f}\n" for i in range(60_000))
    packed = gzip.compress(body.encode())                      # reference: gzip module
    path = tmp_path / "day3.csv.gz"
    path.write_bytes(packed[: len(packed) * 3 // 4])
    with pytest.raises(DataSourceError, match=r"day3\.csv\.gz: read failed after data row"):
        list(open_source(str(path)).batches(["power_w"], batch_rows=5000))
    jpath = tmp_path / "day4.jsonl"
    jpath.write_text('{"power_w": 1}\n{"power_w": 2}\n{"power_w": 3\n{"power_w": 4}\n')
    with pytest.raises(DataSourceError, match=r"day4\.jsonl: data row 2 is not valid JSON"):
        list(open_source(str(jpath)).batches(["power_w"]))


def test_columns_hint(tmp_path):
    path = write(telemetry(5), tmp_path / "fleet.csv", "csv")
    src = open_source(path, columns_hint={"fan_rpm": "string"})
    got, _ = collect(src.batches(["fan_rpm"]))
    assert got["fan_rpm"] == [str(int(v)) for v in reference(path, "csv")["fan_rpm"]]
    with pytest.raises(ColumnNotFoundError, match="cpu_load"):
        open_source(path, columns_hint=["cpu_lod"])


def test_compatible_numeric_widening_across_files(tmp_path):
    a = tmp_path / "a.parquet"
    b = tmp_path / "b.parquet"
    pq.write_table(pa.table({"fan_rpm": pa.array([1000, 2000], pa.int32())}), a)
    pq.write_table(pa.table({"fan_rpm": pa.array([1500.5], pa.float64())}), b)
    src = open_source([str(a), str(b)])
    assert src.schema.field("fan_rpm").type == pa.float64()
    got, _ = collect(src.batches(["fan_rpm"]))
    assert got["fan_rpm"] == [1000.0, 2000.0, 1500.5]


def test_fingerprint_and_describe(tmp_path):
    paths = [write(telemetry(4), tmp_path / f"d{k}.parquet", "parquet") for k in range(3)]
    src = open_source(str(tmp_path))
    fp = src.fingerprint()
    assert fp["format"] == "parquet"
    assert [f["path"] for f in fp["files"]] == paths
    assert [f["size"] for f in fp["files"]] == [os.stat(p).st_size for p in paths]  # reference: os.stat
    assert [f["mtime"] for f in fp["files"]] == pytest.approx([os.stat(p).st_mtime for p in paths])
    assert src.describe().startswith("3 Parquet files, ")


# --------------------------------------------------------------------------- errors

def test_missing_file_and_empty_inputs(tmp_path):
    with pytest.raises(DataSourceError, match="no such file"):
        open_source(str(tmp_path / "nope.parquet"))
    with pytest.raises(DataSourceError, match="no files match"):
        open_source(str(tmp_path / "*.parquet"))
    (tmp_path / "empty").mkdir()
    (tmp_path / "empty" / "_SUCCESS").write_text("")
    with pytest.raises(DataSourceError, match="no data files"):
        open_source(str(tmp_path / "empty"))
    from tallfit.inputs import as_source

    with pytest.raises(DataSourceError, match="list of files is empty"):
        as_source([])  # an empty list is not an empty stream of batches


def test_mixed_formats_rejected(tmp_path):
    write(telemetry(3), tmp_path / "a.csv", "csv")
    write(telemetry(3), tmp_path / "b.parquet", "parquet")
    with pytest.raises(DataSourceError, match="mixes file formats"):
        open_source(str(tmp_path))


@pytest.mark.parametrize("fmt", FORMATS)
def test_unknown_column_suggests_nearest(tmp_path, fmt):
    path = write(telemetry(3), tmp_path / f"fleet.{EXT[fmt]}", fmt)
    with pytest.raises(ColumnNotFoundError, match=r"did you mean 'power_w'") as info:
        open_source(path).batches(["power_kw"])
    assert path in str(info.value)


def test_truncated_parquet_names_file(tmp_path):
    path = write(telemetry(2000), tmp_path / "day7.parquet", "parquet")
    data = open(path, "rb").read()
    with open(path, "wb") as f:
        f.write(data[: len(data) // 2])
    with pytest.raises(DataSourceError, match="day7.parquet") as info:
        list(open_source(path).batches(["power_w"]))
    assert isinstance(info.value, TallfitError)


def test_corrupt_parquet_page_mid_file_names_rows(tmp_path):
    path = str(tmp_path / "day8.parquet")
    table = pa.table({"power_w": np.arange(40_000, dtype=float)})
    pq.write_table(table, path, row_group_size=10_000, compression="snappy", use_dictionary=False)
    meta = pq.ParquetFile(path).metadata
    col = meta.row_group(2).column(0)                        # damage the third row group's data page
    start = col.data_page_offset + 20
    blob = bytearray(open(path, "rb").read())
    blob[start: start + 400] = bytes(400)
    with open(path, "wb") as f:
        f.write(blob)
    with pytest.raises(DataSourceError, match=r"day8\.parquet.*after row 20,000"):
        list(open_source(path).batches(["power_w"], batch_rows=10_000))


@pytest.mark.parametrize("engine", ["pyarrow", "polars"])
def test_bad_value_in_later_csv_block_names_file_column_row(tmp_path, engine):
    n, bad = 90_000, 80_123                                 # well past the 1 MiB inference block
    path = tmp_path / "rack7.csv"
    with open(path, "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["cpu_load", "inlet_temp", "power_w"])
        for i in range(n):
            w.writerow([f"{i % 97}.25", "23.5" if i != bad else "hot", f"{200 + i % 13}.5"])
    assert open(path, "rb").read().index(b"hot") > 1 << 20   # beyond the leading block used for inference
    src = open_source(str(path))
    src._use_engine(engine)
    with pytest.raises(DataSourceError) as info:
        for _ in src.batches(["power_w", "inlet_temp"], batch_rows=10_000):
            pass
    msg = str(info.value)
    assert "rack7.csv" in msg and "'inlet_temp'" in msg and "'hot'" in msg
    assert f"data row {bad:,}" in msg and f"line {bad + 2:,}" in msg     # line numbers as counted by csv.writer


def test_conflicting_schemas_name_both_files(tmp_path):
    a = tmp_path / "day1.parquet"
    b = tmp_path / "day2.parquet"
    pq.write_table(pa.table({"rack": [1.0, 2.0], "power_w": [1.0, 2.0]}), a)
    pq.write_table(pa.table({"rack": ["r1", "r2"], "power_w": [3.0, 4.0]}), b)
    with pytest.raises(SchemaError) as info:
        open_source(str(tmp_path)).schema
    msg = str(info.value)
    assert str(a) in msg and str(b) in msg and "'rack'" in msg


def test_conflicting_csv_files_name_both_files(tmp_path):
    a = tmp_path / "day1.csv"
    b = tmp_path / "day2.csv"
    a.write_text("rack,power_w\n1,10\n2,20\n")
    b.write_text("rack,power_w\nr1,30\nr2,40\n")
    with pytest.raises(SchemaError) as info:
        list(open_source([str(a), str(b)]).batches(["rack", "power_w"]))
    msg = str(info.value)
    assert str(a) in msg and str(b) in msg and "'rack'" in msg


def test_iterable_source_passes(tmp_path):
    table = telemetry(10)
    ref = table.select(["power_w", "cpu_load"]).to_pydict()      # reference: pyarrow.Table.select

    def gen():
        yield from table.to_batches(max_chunksize=4)

    one_shot = IterableSource(gen(), name="telemetry feed")
    assert one_shot.schema.names == table.column_names
    got, chunks = collect(one_shot.batches(["power_w", "cpu_load"], batch_rows=3))
    assert got == ref
    assert all(ch.batch.num_rows <= 3 and ch.file_index == -1 for ch in chunks)
    assert [ch.row_start for ch in chunks] == [0, 3, 6, 9]          # 4-row input batches regrouped by 3
    with pytest.raises(DataSourceError, match="re-iterable"):
        one_shot.batches(["power_w"])
    again = IterableSource(gen, name="telemetry feed")
    for _ in range(2):
        assert collect(again.batches(["power_w", "cpu_load"], batch_rows=6))[0] == ref
    listed = IterableSource([table])
    for _ in range(2):
        assert collect(listed.batches(["cpu_load"]))[0] == {"cpu_load": ref["cpu_load"]}
    with pytest.raises(ColumnNotFoundError, match="cpu_load"):
        listed.batches(["cpu_lod"])


# --------------------------------------------------------------------------- memory

def test_parquet_streaming_memory_stays_bounded(tmp_path):
    n, k, batch_rows = 200_000, 8, 10_000
    rng = np.random.default_rng(3)
    table = pa.table({f"m{i}": rng.normal(size=n) for i in range(k)})
    path = str(tmp_path / "big.parquet")
    pq.write_table(table, path, row_group_size=n, use_dictionary=False, data_page_size=64 << 10)
    total = table.nbytes
    del table
    batch_bytes = batch_rows * k * 8
    base = pa.total_allocated_bytes()                       # reference: pyarrow's default memory pool
    peak = rows = 0
    for ch in open_source(path).batches([f"m{i}" for i in range(k)], batch_rows=batch_rows):
        rows += ch.batch.num_rows
        peak = max(peak, pa.total_allocated_bytes() - base)
        del ch
    assert rows == n
    assert peak < 8 * batch_bytes < total / 2, (peak, batch_bytes, total)


def test_side_json_metadata_is_ignored_beside_other_formats(tmp_path):
    import pyarrow.parquet as pq

    from tallfit.sources import open_source

    pq.write_table(pa.table({"cpu_util": [0.1, 0.2]}), tmp_path / "part-0.parquet")
    (tmp_path / "truth.json").write_text('{"generator": "x"}')
    src = open_source(tmp_path)
    assert [f.format for f in src.files] == ["parquet"]
