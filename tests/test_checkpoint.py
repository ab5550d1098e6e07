"""Checkpoint and resume: a fit killed (SIGKILL) at any data pass and run again with the same
checkpoint gives the uninterrupted fit, reads only the passes not yet done, and leaves no
scratch copy behind; checkpoints of other jobs are refused."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import tallgam as tg
from tallgam.errors import SpecError


def _book(folder, n=60_000, seed=3):
    """Invented claim counts (synthetic truth), in three Parquet files."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, 10, n)
    z = np.round(rng.uniform(-2, 2, n), 2)
    g = rng.integers(0, 6, n)
    e = rng.uniform(0.2, 1.0, n)
    y = rng.poisson(e * np.exp(-1.5 + 0.3 * np.sin(x) + 0.2 * z * z + 0.1 * g))
    paths = []
    for i in range(3):
        s = slice(i * n // 3, (i + 1) * n // 3)
        p = os.path.join(folder, f"part{i}.parquet")
        pq.write_table(pa.table({"x": x[s], "z": z[s], "g": [f"g{v}" for v in g[s]],
                                 "e": e[s], "y": y[s]}), p)
        paths.append(p)
    return os.path.join(folder, "part*.parquet")


MODEL = """
import tallgam as tg
model = tg.Model(response="y", family={family!r}, exposure="e",
                 terms=[tg.spline("x", size=10), tg.spline("z", size=8),
                        tg.categorical("g")])
"""

# a child that fits with a checkpoint and kills itself (SIGKILL: no clean-up runs) when the
# given data pass has ended, before its sums are recorded
CHILD = MODEL + """
import os, signal, sys
seen = [0]
def progress(ev):
    if ev.kind == "end" and ev.task.split()[-1].isdigit() and "sample" not in ev.task:
        seen[0] += 1
        if seen[0] == {kill_at}:
            os.kill(os.getpid(), signal.SIGKILL)
model.fit({data!r}, checkpoint={checkpoint!r}, progress=progress, binned=True,
          scratch={scratch!r}, tuning=tg.options.Tuning(sample_share=0))
print("finished")
"""


def _model(family="poisson"):
    ns: dict = {}
    exec(MODEL.format(family=family), ns)  # the same text as the child's
    return ns["model"]


def _leftovers(folder) -> list[str]:
    return [f for f in os.listdir(folder) if f.startswith(("tallgam-", ".tallgam-"))]


@pytest.fixture(scope="module")
def book(tmp_path_factory):
    return _book(str(tmp_path_factory.mktemp("book")))


@pytest.fixture(scope="module")
def reference(book):
    """The uninterrupted fit (binned passes with a scratch copy, no sample start)."""
    return _model().fit(book, binned=True, tuning=tg.options.Tuning(sample_share=0))


@pytest.mark.parametrize("kill_at", [1, 2, 4])
def test_sigkill_then_resume_equals_uninterrupted_fit(book, reference, tmp_path, kill_at):
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    ck = str(tmp_path / "fit.checkpoint")
    code = CHILD.format(family="poisson", kill_at=kill_at, data=book, checkpoint=ck,
                        scratch=str(scratch))
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=300)
    assert run.returncode == -signal.SIGKILL, run.stderr[-2000:]
    assert "finished" not in run.stdout
    assert os.path.exists(ck)
    if kill_at > 1:   # the first pass wrote a scratch copy, which the kill left behind
        assert _leftovers(scratch)
    seen = []
    fit = _model().fit(book, checkpoint=ck, binned=True, scratch=str(scratch),
                       tuning=tg.options.Tuning(sample_share=0),
                       progress=lambda ev: seen.append(ev))
    # the passes finished before the kill were not read again
    assert fit.statistics["checkpoint"]["replayed_passes"] == kill_at - 1
    read = {ev.task for ev in seen if ev.kind == "end" and ev.task.startswith("pass")}
    assert len(read) == fit.statistics["passes"] - (kill_at - 1)
    np.testing.assert_allclose(fit.coefficients_raw, reference.coefficients_raw,
                               rtol=1e-9, atol=1e-12)
    assert fit.statistics["passes"] == reference.statistics["passes"]
    assert fit.deviance == pytest.approx(reference.deviance, rel=1e-12)
    assert not os.path.exists(ck)          # removed when the fit ends
    assert _leftovers(scratch) == []       # the dead run's scratch copy is gone too


def test_cut_line_is_dropped_and_profile_replayed(book, tmp_path, interrupt_fit):
    """A kill in the middle of writing a record leaves a partial last line: it is dropped."""
    ck = str(tmp_path / "c.ckpt")
    interrupt_fit(lambda p: _model().fit(book, checkpoint=ck, progress=p, binned=False), 2)
    with open(ck, "ab") as fh:
        fh.write(b'0123abc {"call": "working", "tag": "cut sh')
    again = []
    fit = _model().fit(book, checkpoint=ck, progress=again.append, binned=False)
    # kept: the profile's two scans, the (empty: small data) sample start and pass 1; the
    # cut record was dropped
    assert fit.statistics["checkpoint"] == {"replayed_passes": 1, "replayed_scans": 4}
    assert not [ev for ev in again if ev.task == "pass 1"]
    ref = _model().fit(book, binned=False)
    np.testing.assert_allclose(fit.coefficients_raw, ref.coefficients_raw, rtol=1e-9,
                               atol=1e-12)


def test_checkpoint_of_another_model_or_changed_data_is_refused(book, tmp_path,
                                                                interrupt_fit):
    ck = str(tmp_path / "c.ckpt")
    interrupt_fit(lambda p: _model().fit(book, checkpoint=ck, progress=p), 1)
    other = tg.Model(response="y", family="poisson", exposure="e",
                     terms=[tg.spline("x", size=9)])
    with pytest.raises(SpecError, match="belongs to another fit"):
        other.fit(book, checkpoint=ck)
    with pytest.raises(SpecError, match="belongs to another fit"):
        _model().fit(book, checkpoint=ck, binned=False)   # other options
    first = book.replace("part*", "part0")
    st = os.stat(first)
    os.utime(first, ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000_000))
    try:
        with pytest.raises(SpecError, match="changed data"):
            _model().fit(book, checkpoint=ck)
    finally:
        os.utime(first, ns=(st.st_atime_ns, st.st_mtime_ns))
    fit = _model().fit(book, checkpoint=ck)   # the same job again resumes
    assert fit.statistics["checkpoint"]["replayed_passes"] == 0   # killed in pass 1
    assert fit.converged


def test_not_a_checkpoint_and_bad_paths(book, tmp_path):
    junk = tmp_path / "junk.json"
    junk.write_text(json.dumps({"format": "something else"}) + "\n")
    with pytest.raises(SpecError, match="checkpoint"):
        _model().fit(book, checkpoint=str(tmp_path))            # a folder
    with pytest.raises(SpecError, match="does not exist"):
        _model().fit(book, checkpoint=str(tmp_path / "no" / "c"))
    # a file that is not a checkpoint (another output given by mistake) is never overwritten
    with pytest.raises(SpecError, match="not a tallgam checkpoint"):
        _model().fit(book, checkpoint=str(junk))
    assert junk.read_text().startswith('{"format": "something else"}')
    empty = tmp_path / "empty.ckpt"   # killed before its first line was whole
    empty.write_bytes(b"")
    fit = _model().fit(book, checkpoint=str(empty))
    assert fit.converged and not empty.exists()


def test_tweedie_profile_and_table_source_resume(tmp_path, interrupt_fit):
    """A fit of many runs (the Tweedie power search) and an in-memory table resume too."""
    rng = np.random.default_rng(11)
    n = 8000
    x = rng.uniform(0, 1, n)
    mu = np.exp(0.5 + np.sin(3 * x))
    counts = rng.poisson(0.6 * mu ** 0.3, n)
    y = np.array([rng.gamma(2.0, m / 2.0, c).sum() for m, c in zip(mu ** 0.7, counts)])
    table = pa.table({"x": x, "y": y})
    model = tg.Model(response="y", family=tg.get_family("tweedie", power="profile"),
                     terms=[tg.spline("x", size=8)])
    ref = model.fit(table)
    ck = str(tmp_path / "t.ckpt")
    interrupt_fit(lambda p: model.fit(table, checkpoint=ck, progress=p), 7)
    fit = model.fit(table, checkpoint=ck)
    assert fit.statistics["checkpoint"]["replayed_passes"] == 6
    assert fit.statistics["family_profile"]["value"] == pytest.approx(
        ref.statistics["family_profile"]["value"], rel=1e-9)
    np.testing.assert_allclose(fit.coefficients_raw, ref.coefficients_raw, rtol=1e-9)
    changed = table.set_column(1, "y", pa.array(y * 1.01))
    interrupt_fit(lambda p: model.fit(changed, checkpoint=ck, progress=p), 1)
    with pytest.raises(SpecError, match="another fit"):
        model.fit(table, checkpoint=ck)


def test_command_line_checkpoint(book, tmp_path):
    spec = tmp_path / "m.toml"
    spec.write_text(textwrap.dedent(f"""\
        data = {json.dumps(book)}
        response = "y"
        family = "poisson"
        exposure = "e"
        checkpoint = "m.ckpt"

        [[term]]
        kind = "spline"
        column = "x"
        """))
    from tallgam.spec import load_spec

    assert load_spec(str(spec)).checkpoint == str(tmp_path / "m.ckpt")
    out = tmp_path / "m.json"
    run = subprocess.run([sys.executable, "-m", "tallgam", "fit", str(spec), "-o", str(out),
                          "--checkpoint", str(tmp_path / "cli.ckpt"), "-q"],
                         capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr
    assert out.exists() and not (tmp_path / "cli.ckpt").exists()
