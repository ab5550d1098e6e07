"""The same fit and the same scores on a Dask cluster (a real LocalCluster: two worker
processes with one thread each, on loopback) as in this process, including when a worker
dies in the middle of a pass. The local fit is the reference; the cluster sums the same
partial states in another grouping, so agreement is to rounding (checked at 1e-9)."""

from __future__ import annotations

import os
import subprocess
import sys

import distributed  # the test and dask extras install it
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import tallgam as tg
from tallgam.data.sources import open_source
from tallgam.options import Tuning
from tallgam.passes import cluster as tgc
from tallgam.progress import Event

pytestmark = [pytest.mark.filterwarnings("ignore::tallgam.TallgamWarning"),
              pytest.mark.slow]  # a real Dask LocalCluster

RTOL = 1e-9
N_FILES = 5
ROWS_PER_FILE = 4000


def book_frame(seed: int = 11, n: int = N_FILES * ROWS_PER_FILE) -> pd.DataFrame:
    """A synthetic book with a known additive truth (a gaussian and a Poisson response)."""
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({
        "row_id": np.arange(n),
        "age": rng.integers(18, 80, n).astype(float),
        "power": rng.uniform(40, 200, n),
        "region": rng.choice(["north", "south", "east", "west", "centre"], n),
        "exposure": rng.uniform(0.1, 1.0, n),
    })
    region = df.region.map({"north": 0.1, "south": -0.2, "east": 0.0, "west": 0.15,
                            "centre": -0.05}).to_numpy()
    f_age = 0.6 * np.exp(-(df.age.to_numpy() - 18) / 12)
    f_power = 0.4 * np.sin(df.power.to_numpy() / 40)
    df["y"] = 3 + f_age + f_power + region + rng.normal(0, 0.5, n)
    df["claims"] = rng.poisson(df.exposure * np.exp(-1.5 + f_age + f_power + region))
    return df


def gaussian_model():
    return tg.Model(response="y", family="gaussian",
                    terms=[tg.spline("age", size=8), tg.spline("power", size=6),
                           tg.categorical("region")])


def poisson_model():
    return tg.Model(response="claims", family="poisson", exposure="exposure",
                    terms=[tg.spline("age", size=8), tg.spline("power", size=6),
                           tg.categorical("region")])


@pytest.fixture(scope="module")
def book(tmp_path_factory):
    folder = tmp_path_factory.mktemp("cluster-book")
    df = book_frame()
    for i in range(N_FILES):
        part = df.iloc[i * ROWS_PER_FILE:(i + 1) * ROWS_PER_FILE]
        part.to_parquet(folder / f"book-{i:02d}.parquet", index=False)
    return folder, df


@pytest.fixture(scope="module")
def client():
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as lc, \
            distributed.Client(lc, set_as_default=False) as c:
        yield c


def assert_same_fit(a, b, rtol=RTOL):
    """Coefficients, covariance and statistics equal to ``rtol`` (relative to their size)."""
    def close(x, y, what):
        x, y = np.asarray(x, float), np.asarray(y, float)
        scale = max(np.max(np.abs(y)), 1e-300)
        err = np.max(np.abs(x - y)) / scale
        assert err <= rtol, f"{what}: relative difference {err:.3g}"
    close(a.coefficients_raw, b.coefficients_raw, "coefficients")
    close(a.covariance.matrix(), b.covariance.matrix(), "covariance")
    for key in ("deviance", "null_deviance", "scale", "loglik"):
        close(getattr(a, key), getattr(b, key), key)
    for label, value in b.smoothing.items():
        close(a.smoothing[label], value, f"smoothing of {label}")
    for label, value in b.edf.items():
        close(a.edf[label], value, f"edf of {label}")
    assert a.passes == b.passes


@pytest.mark.parametrize("make", [gaussian_model, poisson_model], ids=["gaussian", "poisson"])
def test_cluster_fit_equals_local_fit(book, client, make):
    folder, _ = book
    data = str(folder / "*.parquet")
    local = make().fit(data, batch_rows=1500)
    events: list[Event] = []
    remote = make().fit(data, batch_rows=1500, cluster=client, progress=events.append)
    assert_same_fit(remote, local)
    assert remote.converged
    # progress: every pass advanced through every partition, to the total
    ends = [e for e in events if e.kind == "end" and e.task.startswith("pass")]
    assert len(ends) == remote.passes
    assert all(e.rows == len(book[1]) for e in ends)


def test_binned_cluster_fit_equals_local_binned_fit(book, client):
    # the coded design (tables, grids) travels in the plan; workers stream and code
    folder, _ = book
    data = str(folder / "*.parquet")
    local = poisson_model().fit(data, batch_rows=1500, binned=True)
    remote = poisson_model().fit(data, batch_rows=1500, binned=True, cluster=client)
    assert_same_fit(remote, local)
    assert any(n.startswith("binned passes") for n in remote.notes)


def test_interrupted_cluster_fit_resumes_from_its_checkpoint(book, client, tmp_path,
                                                             interrupt_fit):
    # the checkpoint records what the cluster's passes returned; the resumed fit reads on
    folder, _ = book
    data = str(folder / "*.parquet")
    ckpt = str(tmp_path / "cluster.ckpt")
    whole = poisson_model().fit(data, batch_rows=1500, cluster=client)
    interrupt_fit(lambda p: poisson_model().fit(data, batch_rows=1500, cluster=client,
                                                checkpoint=ckpt, progress=p), 3)
    resumed = poisson_model().fit(data, batch_rows=1500, cluster=client, checkpoint=ckpt)
    assert resumed.statistics["checkpoint"]["replayed_passes"] == 2
    assert_same_fit(resumed, whole)
    assert not os.path.exists(ckpt)


def test_single_file_is_split_at_row_groups(tmp_path, client, monkeypatch):
    df = book_frame(seed=5, n=12000)
    path = tmp_path / "one.parquet"
    pq.write_table(pa.Table.from_pandas(df, preserve_index=False), path, row_group_size=1000)
    with open_source(str(path)) as source:
        parts = tgc.partitions_of(str(path), source, min_rows=2500)
    assert [p.rows for p in parts] == [(0, 3000), (3000, 6000), (6000, 9000), (9000, 12000)]
    local = poisson_model().fit(str(path), batch_rows=1000)
    remote = poisson_model().fit(str(path), batch_rows=1000, cluster=client,
                                 tuning=Tuning(partition_min_rows=2500))
    assert_same_fit(remote, local)


def test_partitions_read_exactly_their_rows(tmp_path):
    """Row-group ranges, hive directories and CSV files: the partitions, opened as a worker
    opens them, hold exactly the rows of the whole source, in order, with its column types."""
    df = book_frame(seed=2, n=6000)
    one = tmp_path / "one.parquet"
    pq.write_table(pa.Table.from_pandas(df, preserve_index=False), one, row_group_size=500)
    hive = tmp_path / "hive"
    for region, part in df.groupby("region"):
        (hive / f"region={region}").mkdir(parents=True)
        part.drop(columns="region").to_parquet(hive / f"region={region}" / "p.parquet",
                                               index=False)
    csv = tmp_path / "csv"
    csv.mkdir()
    for i in range(3):
        df.iloc[i * 2000:(i + 1) * 2000].to_csv(csv / f"p{i}.csv", index=False)
    for data, expect in [(str(one), 3), (str(hive), 5), (str(csv / "*.csv"), 3)]:
        source = open_source(data)
        whole = source.query("SELECT * FROM tallgam_source").to_arrow_table()
        parts = tgc.partitions_of(data, source, min_rows=2000)
        assert len(parts) == expect
        pieces = []
        for part in parts:
            ps = tgc.open_partition(part)
            assert ps.schema == source.schema
            pieces.append(ps.query("SELECT * FROM tallgam_source").to_arrow_table())
            ps.connection.close()
        assert pa.concat_tables(pieces).equals(whole)
        source.close()


def test_worker_killed_mid_fit_gives_the_same_fit(book, client, tmp_path):
    """A worker process exits (os._exit) when it starts a task of the second pass; Dask
    runs that worker's tasks again elsewhere and the fit is the same."""
    folder, _ = book
    data = str(folder / "*.parquet")
    marker = str(tmp_path / "killed-once")

    class KillOnce(distributed.WorkerPlugin):
        name = "tallgam-test-kill-once"

        def transition(self, key, start, finish, **kwargs):
            if finish == "executing" and str(key).startswith("tallgam-working-pass-2-"):
                try:
                    fd = os.open(marker, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
                except FileExistsError:
                    return
                os.write(fd, str(key).encode())
                os.close(fd)
                os._exit(17)

    local = poisson_model().fit(data, batch_rows=1500)
    client.register_plugin(KillOnce())
    try:
        remote = poisson_model().fit(data, batch_rows=1500, cluster=client)
    finally:
        client.unregister_worker_plugin(KillOnce.name)
    assert os.path.exists(marker), "no worker was killed"
    assert "tallgam-working-pass-2" in open(marker).read()
    assert_same_fit(remote, local)
    client.wait_for_workers(2, timeout=60)


def test_cluster_scoring_equals_local_scoring(book, client, tmp_path):
    folder, df = book
    data = str(folder / "*.parquet")
    fit = poisson_model().fit(data, batch_rows=1500)
    fit.score(data, tmp_path / "local.parquet", keep=["row_id"], se=True, batch_rows=1500)
    out = tmp_path / "scored"
    report = fit.score(data, out, keep=["row_id"], se=True, batch_rows=1500, cluster=client)
    assert report.rows == len(df)
    names = sorted(os.listdir(out))
    assert names == [f"part-{i:05d}.parquet" for i in range(N_FILES)]
    parts = pa.concat_tables([pq.read_table(out / n) for n in names])
    local = pq.read_table(tmp_path / "local.parquet")
    assert parts.column_names == local.column_names
    assert parts.column("row_id").equals(local.column("row_id"))
    for col in ("prediction", "link", "prediction_se", "link_se"):
        np.testing.assert_allclose(parts.column(col).to_numpy(), local.column(col).to_numpy(),
                                   rtol=1e-12, atol=0)
    assert not [e for e in os.listdir(tmp_path) if e.startswith(".tallgam")]
    # a second run replaces a directory of parts
    fit.score(data, out, keep=["row_id"], batch_rows=1500, cluster=client)
    assert pq.read_table(out / names[0]).column_names == ["row_id", "prediction", "link"]


def test_failed_cluster_scoring_leaves_no_output(book, client, tmp_path):
    folder, df = book
    fit = gaussian_model().fit(str(folder / "*.parquet"))
    data = tmp_path / "data"
    data.mkdir()
    for i in range(4):
        part = df.iloc[i * 1000:(i + 1) * 1000].copy()
        if i == 2:
            part.loc[part.index[10], "region"] = "atlantis"  # a level never seen in training
        part.to_parquet(data / f"p{i}.parquet", index=False)
    out = tmp_path / "out"
    with pytest.raises(tg.DataError, match=r"partition 3 of 4 \(p2\.parquet\).*atlantis"):
        fit.score(str(data), out, unseen="error", cluster=client)
    assert sorted(os.listdir(tmp_path)) == ["data"]  # no output, no temporary directory
    # with unseen="base" the same data score, and the report counts the row
    report = fit.score(str(data), out, unseen="base", cluster=client)
    assert report.unseen["region"] == 1 and report.rows == 4000
    assert len(os.listdir(out)) == 4


def test_data_not_in_files_is_refused(book, client, tmp_path):
    _, df = book
    import duckdb

    db = str(tmp_path / "book.duckdb")
    with duckdb.connect(db) as con:
        con.execute("CREATE TABLE book AS SELECT * FROM df")
    for data in (df, pa.Table.from_pandas(df), tg.sql("SELECT * FROM book", database=db)):
        with pytest.raises(tg.DataError, match="files that every worker can read"):
            gaussian_model().fit(data, cluster=client)
    fit = gaussian_model().fit(df)
    with pytest.raises(tg.DataError, match="files that every worker can read"):
        fit.score(df, tmp_path / "out", cluster=client)
    assert not (tmp_path / "out").exists()


def test_path_missing_on_workers_is_named(book, client, monkeypatch):
    """The client reads the data, a worker does not see a file: the error names the worker
    and the path, before the first data pass."""
    folder, _ = book
    ghost = str(folder / "only-on-the-client.parquet")
    real = tgc.partitions_of

    def moved(data, source, **kw):
        parts = real(data, source, **kw)
        p = parts[1]
        parts[1] = tgc.Partition(p.index, p.count, p.kind, (ghost,), p.rows, p.hive_types,
                                 p.schema)
        return parts
    monkeypatch.setattr(tgc, "partitions_of", moved)
    events = []
    with pytest.raises(tg.DataError) as info:
        gaussian_model().fit(str(folder / "*.parquet"), cluster=client, progress=events.append)
    msg = str(info.value)
    worker = next(iter(client.scheduler_info()["workers"]))
    assert worker in msg and ghost in msg and "readable by every worker" in msg
    assert not [e for e in events if e.task.startswith("pass")]


def test_command_line_with_cluster(book, client, tmp_path, monkeypatch):
    from tallgam.cli import main

    folder, df = book
    spec = tmp_path / "model.toml"
    spec.write_text(f'data = "{folder}/*.parquet"\nresponse = "claims"\nfamily = "poisson"\n'
                    'exposure = "exposure"\n\n[[term]]\nkind = "spline"\ncolumn = "age"\n'
                    'size = 8\n\n[[term]]\nkind = "categorical"\ncolumn = "region"\n')
    address = client.scheduler.address
    assert main(["fit", str(spec), "-o", str(tmp_path / "m.json"), "-q",
                 "--cluster", address]) == 0
    local = tg.Model(response="claims", family="poisson", exposure="exposure",
                     terms=[tg.spline("age", size=8), tg.categorical("region")]
                     ).fit(str(folder / "*.parquet"))
    assert_same_fit(tg.load(tmp_path / "m.json"), local)
    assert main(["score", str(tmp_path / "m.json"), str(folder / "*.parquet"), "-o",
                 str(tmp_path / "scores"), "--cluster", address, "-q"]) == 0
    assert len(os.listdir(tmp_path / "scores")) == N_FILES
    monkeypatch.setattr(tgc, "CONNECT_SECONDS", 1)
    assert main(["score", str(tmp_path / "m.json"), str(folder / "*.parquet"), "-o",
                 str(tmp_path / "x"), "--cluster", "tcp://127.0.0.1:1", "-q"]) == 1
    assert not (tmp_path / "x").exists()


def test_local_fit_does_not_import_dask(book, tmp_path):
    folder, _ = book
    code = (
        "import sys, tallgam as tg\n"
        f"m = tg.Model(response='y', terms=[tg.spline('age'), tg.categorical('region')])\n"
        f"fit = m.fit({str(folder / '*.parquet')!r})\n"
        f"fit.score({str(folder / '*.parquet')!r}, {str(tmp_path / 's.parquet')!r})\n"
        "assert 'dask' not in sys.modules and 'distributed' not in sys.modules, "
        "sorted(m for m in sys.modules if 'dask' in m or 'distributed' in m)\n")
    subprocess.run([sys.executable, "-c", code], check=True, timeout=300)


def test_missing_dask_says_how_to_install(book, monkeypatch):
    folder, _ = book
    monkeypatch.setitem(sys.modules, "distributed", None)  # as if not installed
    with pytest.raises(tg.SpecError, match=r"pip install 'tallgam\[dask\]'"):
        gaussian_model().fit(str(folder / "*.parquet"), cluster="tcp://127.0.0.1:1")


def test_profile_of_the_parts_merges_to_the_profile_of_the_whole(book):
    # the profile's scans are sums that merge: per file, then merged, as the cluster does
    from tallgam.data.inputs import model_inputs
    from tallgam.data.profile import histogram_scan, profile_scan

    folder, _ = book
    data = str(folder / "*.parquet")
    model = poisson_model()
    with open_source(data) as source:
        inputs = model_inputs(model, source, model.terms)
        fields, rules = inputs.profile_fields, inputs.rules
        whole = profile_scan(source, fields, rules, None)
        parts = [profile_scan(tgc.open_partition(p), fields, rules, None)
                 for p in tgc.partitions_of(data, source)]
    merged = parts[0]
    for p in parts[1:]:
        merged = merged.merge(p)
    a, b = whole.profile(fields, rules), merged.profile(fields, rules)
    assert a.rows == b.rows == N_FILES * ROWS_PER_FILE
    for name, col in a.columns.items():
        other = b.columns[name]
        for key in ("min", "max", "nulls", "integer"):
            assert getattr(col, key, None) == getattr(other, key, None), (name, key)
        if col.kind == "numeric":
            assert other.mean == pytest.approx(col.mean, rel=1e-12)
            assert other.sd == pytest.approx(col.sd, rel=1e-10)
        else:
            assert list(col.labels) == list(other.labels)
            np.testing.assert_array_equal(col.rows, other.rows)
    with open_source(data) as source:
        weight = inputs.select_expr("__wc")
        h_whole = histogram_scan(source, a, fields, weight, None)
        h_parts = [histogram_scan(tgc.open_partition(p), a, fields, weight, None)
                   for p in tgc.partitions_of(data, source)]
    h = h_parts[0]
    for p in h_parts[1:]:
        h = h.merge(p)
    for name in h_whole.rows:
        np.testing.assert_array_equal(h.rows[name], h_whole.rows[name])
        np.testing.assert_allclose(h.weight[name], h_whole.weight[name], rtol=1e-12)


def test_binned_cluster_fit_reads_the_data_once_and_removes_its_copies(book, monkeypatch,
                                                                      tmp_path):
    # workers in this process (threads), so the reads can be counted; the copies of the
    # coded rows live in the workers' folders and are gone when the fit ends
    folder, _ = book
    data = str(folder / "*.parquet")
    opened = []
    real = tgc.open_partition

    def counting(part, threads=None):
        opened.append(part.index)
        return real(part, threads)
    monkeypatch.setattr(tgc, "open_partition", counting)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None,
                                  local_directory=str(tmp_path)) as lc, \
            distributed.Client(lc, set_as_default=False) as c:
        fit = poisson_model().fit(data, batch_rows=1500, binned=True, cluster=c)
    local = poisson_model().fit(data, batch_rows=1500, binned=True)
    assert fit.passes >= 3
    # the profile's two scans and the first pass read every partition; later passes none
    assert sorted(opened) == sorted(list(range(N_FILES)) * 3)
    assert not [p for p in tmp_path.rglob("tallgam-scratch-*")]
    assert_same_fit(fit, local, rtol=1e-7)
