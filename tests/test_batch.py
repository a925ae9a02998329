"""Batch runner: local pool and Dask give the same table; interrupt + resume; failures recorded."""
import os
import pathlib
import signal
import subprocess
import sys
import time

import pytest

from fe_tool.batch import BatchError, load_batch, main_batch, read_table, run_batch

ROOT = pathlib.Path(__file__).resolve().parent.parent
FAST = "switching_steps = 20, trajectories = 64, step_scale = 0.5, chains = 8"


def _batch_text(root: pathlib.Path) -> str:
    # 10 small probe pairs (2 restraint strengths x 5 seeds: few distinct energies, so few
    # compilations) plus one pair whose energy is NaN
    return f"""
name = "probe-test"
python_path = ["{root}"]

[defaults]
seed = 0
settings = {{ {FAST} }}

[[pair]]
name = "broken"
factory = "examples.restraint_scan:broken_probe"

[[scan]]
name = "probe-k{{stiffness}}-s{{seed}}"
factory = "examples.restraint_scan:probe_restraint"
parameters = {{ dimensions = 2 }}
vary = {{ stiffness = [1.0, 3.0] }}
seeds = [0, 1, 2, 3, 4]
"""


@pytest.fixture
def batch_file(tmp_path):
    path = tmp_path / "probe_test.toml"
    path.write_text(_batch_text(ROOT))
    return path


def _comparable(rows):
    return [{k: v for k, v in r.items() if k != "seconds"} for r in rows]


def test_batch_file_validation(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text('[[pair]]\nname = "x"\nsystem = "harmonic_3d"\nfactory = "a:b"\n')
    with pytest.raises(BatchError, match="exactly one"):
        load_batch(bad)
    bad.write_text('[[pair]]\nname = "x"\nsytem = "harmonic_3d"\n')
    with pytest.raises(BatchError, match="unknown key"):
        load_batch(bad)
    name, tasks = load_batch({"pair": [{"name": "h", "system": "harmonic_3d", "settings": {"budget": 1000}}]})
    assert tasks[0].kind == "system" and tasks[0].settings == {"budget": 1000, "seed": 0}


def test_pool_dask_resume_and_failure(batch_file, tmp_path):
    distributed = pytest.importorskip("distributed")
    name, tasks = load_batch(batch_file)
    assert len(tasks) == 11

    # 1. default local pool (2 spawn workers)
    t0 = time.perf_counter()
    pool = run_batch(batch_file, tmp_path / "pool", workers=2, progress=False)
    print(f"local pool: {time.perf_counter() - t0:.1f} s")
    assert pool.total == 11 and pool.succeeded == 10 and pool.failed == 1 and pool.exit_code == 1
    broken = [r for r in pool.rows if r["name"] == "broken"][0]
    assert broken["status"] == "failed" and "not finite" in broken["error"]
    assert all(r["status"] == "ok" and abs(r["delta_f"]) < 5 for r in pool.rows if r["name"] != "broken")
    # different seeds give different numbers; each stays near the closed form
    values = [r["delta_f"] for r in pool.rows if "k1.0" in r["name"]]
    assert len(values) == 5 and len(set(values)) == 5
    from examples.restraint_scan import probe_restraint_exact
    for r in pool.rows:
        if r["status"] == "ok":
            k = 1.0 if "k1.0" in r["name"] else 3.0
            assert abs(r["delta_f"] - probe_restraint_exact(k, dimensions=2)) < 6 * r["stderr"] + 0.05
    assert (tmp_path / "pool" / "results.csv").read_text().count("\n") == 12
    assert _comparable(read_table(tmp_path / "pool")) == _comparable(pool.rows)

    # 2. the same batch on a Dask cluster over loopback: same table
    t0 = time.perf_counter()
    with distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1, host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        dask = run_batch(batch_file, tmp_path / "dask", scheduler=cluster.scheduler_address, progress=False)
    print(f"dask: {time.perf_counter() - t0:.1f} s")
    assert _comparable(dask.rows) == _comparable(pool.rows)

    # 3. interrupt a serial run after a few pairs, then resume
    out = tmp_path / "resumed"
    t0 = time.perf_counter()
    env = {**os.environ, "FE_TOOL_PROGRESS": "0"}
    proc = subprocess.Popen([sys.executable, "-m", "fe_tool.batch", str(batch_file), "--results", str(out),
                             "--workers", "1"], env=env, cwd=tmp_path, start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.time() + 60
    try:
        while time.time() < deadline and len(read_table(out)) < 4 and proc.poll() is None:
            time.sleep(0.2)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)   # our own subprocess's session only
        proc.wait()
    print(f"interrupted run: {time.perf_counter() - t0:.1f} s")
    partial = read_table(out)
    assert 0 < len(partial) < 11, "the batch should have been interrupted midway"
    t0 = time.perf_counter()
    resumed = run_batch(batch_file, out, workers=1, progress=False)   # in this process: no worker start-up
    print(f"resume: {time.perf_counter() - t0:.1f} s")
    assert resumed.skipped == sum(r["status"] == "ok" for r in partial)
    rows = read_table(out)
    assert sorted(r["name"] for r in rows) == sorted(t.name for t in tasks)   # none lost, none twice
    assert _comparable(rows) == _comparable(pool.rows)

    # 4. exit status: a complete run with the failed pair retried still says 1
    assert main_batch([str(batch_file), "--results", str(out), "--workers", "1", "--quiet"]) == 1
    assert len(read_table(out)) == 11
