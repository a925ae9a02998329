"""Batch runner: local pool and Dask give the same table; Ctrl-C + resume; outcomes per pair;
one runner per results folder; workers die with their runner; malformed batch files refused."""
import os
import pathlib
import signal
import subprocess
import sys
import time

import pytest

from fe_tool.batch import BatchError, load_batch, main_batch, read_table, run_batch

ROOT = pathlib.Path(__file__).resolve().parent.parent
FAST = "budget = 100000, switching_steps = 20, trajectories = 64, step_scale = 0.5, chains = 8"


def _batch_text(root: pathlib.Path, folder: pathlib.Path) -> str:
    # first a pair that sleeps in one worker until the test wakes it, so that the other worker
    # computes (and compiles) everything else once; then one pair whose energy is NaN and 3 small
    # probe pairs (2 restraint strengths, 2 seeds of one): few, since each costs a JAX compilation
    # (in every process that runs it, unless the persistent compilation cache has it)
    return f"""
name = "probe-test"
python_path = ["{root}", "{folder}"]

[defaults]
seed = 0
settings = {{ {FAST} }}

[[pair]]
name = "sleeper"
factory = "{FACTORY_MODULE}:sleeper"
parameters = {{ folder = "{folder}", label = "first" }}

[[pair]]
name = "broken"
factory = "examples.restraint_scan:broken_probe"

[[pair]]
name = "probe-k3.0-s0"
factory = "examples.restraint_scan:probe_restraint"
parameters = {{ dimensions = 2, stiffness = 3.0 }}

[[scan]]
name = "probe-k{{stiffness}}-s{{seed}}"
factory = "examples.restraint_scan:probe_restraint"
parameters = {{ dimensions = 2 }}
vary = {{ stiffness = [1.0] }}
seeds = [0, 1]
"""


@pytest.fixture
def batch_file(tmp_path):
    _factories(tmp_path)
    path = tmp_path / "probe_test.toml"
    path.write_text(_batch_text(ROOT, tmp_path))
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


def test_pool_interrupt_resume_dask_and_failure(batch_file, tmp_path):
    distributed = pytest.importorskip("distributed")
    name, tasks = load_batch(batch_file)
    assert [t.name for t in tasks][:2] == ["sleeper", "broken"] and len(tasks) == 5

    # 1. a local pool (2 spawn workers) in a runner process, stopped by Ctrl-C (SIGINT) while the
    #    first pair still sleeps in a worker: exit status 130, the workers end, finished rows are kept
    results = tmp_path / "pool"
    t0 = time.perf_counter()
    proc = _start_runner(batch_file, results, workers=2)
    try:
        _wait_for(lambda: len(read_table(results)) == 4 or proc.poll() is not None, 900, "four pairs to finish")
        assert proc.poll() is None, proc.communicate()
        os.kill(proc.pid, signal.SIGINT)   # to the runner alone (its workers ignore SIGINT)
        _, err = proc.communicate(timeout=60)
    finally:
        _cleanup(proc, tmp_path)
    print(f"local pool until interrupted: {time.perf_counter() - t0:.1f} s")
    assert proc.returncode == 130 and "interrupted" in err and "Traceback" not in err, err
    assert not _alive(int((tmp_path / "started-first").read_text()))
    rows = {r["name"]: r for r in read_table(results)}
    assert sorted(rows) == sorted(t.name for t in tasks[1:])
    assert rows["broken"]["status"] == "bad input" and "not finite" in rows["broken"]["error"]   # refused at its start
    probes = [rows[t.name] for t in tasks[2:]]
    assert all(r["status"] in ("ok", "flagged") and abs(r["delta_f"]) < 5 for r in probes)
    # different seeds give different numbers; each stays near the closed form (6 reported standard
    # errors plus 0.05 kT for the error of the error: a miss is a real bias, not noise)
    assert len({r["delta_f"] for r in probes if "k1.0" in r["name"]}) == 2
    from examples.restraint_scan import probe_restraint_exact
    for r in probes:
        k = 1.0 if "k1.0" in r["name"] else 3.0
        assert abs(r["delta_f"] - probe_restraint_exact(k, dimensions=2)) < 6 * r["stderr"] + 0.05

    # 2. rerun: the finished pairs are skipped (their rows, timings included, are unchanged); the
    #    refused pair and the interrupted one run again, here in this process (nothing to compile)
    (tmp_path / "wake").write_text("")
    resumed = run_batch(batch_file, results, workers=1, progress=False)
    assert resumed.skipped == 3 and resumed.ran == 2 and resumed.total == 5
    assert resumed.rows[2:] == probes and [r["status"] for r in resumed.rows[:2]] == ["bad input"] * 2
    assert resumed.exit_code == 2   # bad input outranks flagged and ok
    assert (results / "results.csv").read_text().count("\n") == 6
    assert _comparable(read_table(results)) == _comparable(resumed.rows)
    assert main_batch([str(batch_file), "--results", str(results), "--workers", "1", "--quiet"]) == 2

    # 3. two of the pairs on a Dask cluster over loopback: the same rows as from the local pool
    subset = tmp_path / "subset.toml"
    subset.write_text(f"""python_path = ["{ROOT}"]
[defaults]
settings = {{ {FAST} }}
[[pair]]
name = "broken"
factory = "examples.restraint_scan:broken_probe"
[[pair]]
name = "probe-k1.0-s1"
factory = "examples.restraint_scan:probe_restraint"
parameters = {{ dimensions = 2, stiffness = 1.0 }}
seed = 1
""")
    t0 = time.perf_counter()
    with distributed.LocalCluster(n_workers=1, processes=True, threads_per_worker=1, host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        dask = run_batch(subset, tmp_path / "dask", scheduler=cluster.scheduler_address, progress=False)
    print(f"dask: {time.perf_counter() - t0:.1f} s")
    assert _comparable(dask.rows) == _comparable([rows["broken"], rows["probe-k1.0-s1"]])


# ------------------------------------------------------------------ robustness of the runner
# Factories for these tests are written into tmp_path; none of them computes a ΔF except
# `harmonic` (a 1-D Gaussian pair), so the tests below cost process start-ups, not sampling.

FACTORY_MODULE = "fe_batch_test_factories"
FACTORIES = '''
"""Factories for tests/test_batch.py (written there; cheap or deliberately broken)."""
import os
import pathlib
import sys
import time

import numpy as np


def harmonic(stiffness=4.0):
    import jax.numpy as jnp
    return (lambda x: 0.5 * jnp.sum(x ** 2), lambda x: 0.5 * stiffness * jnp.sum(x ** 2),
            np.zeros(1), np.zeros(1), 1.0)


def sleeper(folder, label, seconds=1800.0):
    """Leaves started-LABEL (holding its pid) in folder, then waits for folder/wake (the tests
    wake it or end its process; the time limit only bounds a sleeper left behind by a failure)."""
    folder = pathlib.Path(folder)
    (folder / f"started-{label}").write_text(str(os.getpid()))
    end = time.monotonic() + seconds
    while time.monotonic() < end and not (folder / "wake").exists():
        time.sleep(0.05)
    raise ValueError(f"sleeper {label} woke up")


def wrong_tuple():
    return (1, 2, 3)


def not_a_tuple():
    return "energies"


def raises():
    raise RuntimeError("the factory itself failed")


def energy_raises():
    def energy(x):
        raise RuntimeError("energy crashed")
    return energy, energy, np.zeros(1), np.zeros(1), 1.0


def exits():
    sys.exit(3)


def interrupts():
    raise KeyboardInterrupt


def dies():
    os._exit(9)
'''
LOCK_NAME = ".batch-runner.lock"


def _factories(folder: pathlib.Path) -> str:
    """Writes the factory module into folder; returns the python_path line of a batch file."""
    (folder / f"{FACTORY_MODULE}.py").write_text(FACTORIES)
    return f"python_path = ['{folder}']\n"


def _pair(name: str, function: str, **parameters) -> str:
    params = ", ".join(f"{k} = {v!r}" if not isinstance(v, str) else f"{k} = '{v}'" for k, v in parameters.items())
    return f"[[pair]]\nname = '{name}'\nfactory = '{FACTORY_MODULE}:{function}'\nparameters = {{ {params} }}\n"


def _wait_for(condition, seconds: float, what: str) -> None:
    deadline = time.monotonic() + seconds
    while not condition():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {seconds} s waiting for {what}")
        time.sleep(0.1)


def _alive(pid: int) -> bool:
    try:
        state = pathlib.Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return False
    return state not in ("Z", "X")   # a zombie has stopped computing; only its exit status is left


def _cmdline(pid: int) -> bytes:
    try:
        return pathlib.Path(f"/proc/{pid}/cmdline").read_bytes()
    except OSError:
        return b""


def _children(pid: int) -> set[int]:
    kids = set()
    for stat in pathlib.Path("/proc").glob("[0-9]*/stat"):
        try:
            if int(stat.read_text().rsplit(")", 1)[1].split()[1]) == pid:
                kids.add(int(stat.parent.name))
        except (OSError, IndexError, ValueError):
            continue
    return kids


def _start_runner(batch: pathlib.Path, results: pathlib.Path, workers: int) -> subprocess.Popen:
    env = {**os.environ, "FE_TOOL_PROGRESS": "0", "PYTHONPATH": str(ROOT)}
    return subprocess.Popen([sys.executable, "-m", "fe_tool.batch", str(batch), "--results", str(results),
                             "--workers", str(workers), "--quiet"], env=env, cwd=batch.parent,
                            start_new_session=True, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _cleanup(proc: subprocess.Popen, folder: pathlib.Path) -> None:
    """Ends our own runner subprocess and the sleeping workers it started (only those: their pids
    are in the started-* files they left in folder)."""
    pids = [int(p.read_text()) for p in folder.glob("started-*")]
    for pid in {proc.pid, *pids} - {os.getpid()}:   # a sleeper run in this process left our own pid
        if _alive(pid) and (pid == proc.pid or b"spawn_main" in _cmdline(pid)):   # not a reused pid
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
    proc.communicate(timeout=30)


def _sleepers_batch(tmp_path, first: str = "") -> pathlib.Path:
    batch = tmp_path / "sleepers.toml"
    batch.write_text(_factories(tmp_path) + first + _pair("s1", "sleeper", folder=str(tmp_path), label="s1")
                     + _pair("s2", "sleeper", folder=str(tmp_path), label="s2"))
    return batch


def _worker_pids(tmp_path) -> list[int]:
    return [int((tmp_path / f"started-{s}").read_text()) for s in ("s1", "s2")]


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="finds worker processes through /proc (Linux)")
def test_workers_die_with_a_killed_runner_and_its_folder_lock_is_released(tmp_path, capsys):
    batch = _sleepers_batch(tmp_path, first=_pair("quick", "wrong_tuple"))
    results = tmp_path / "results"
    proc = _start_runner(batch, results, workers=2)
    try:
        _wait_for(lambda: (all((tmp_path / f"started-{s}").exists() for s in ("s1", "s2"))
                           and len(read_table(results)) == 1) or proc.poll() is not None,
                  90, "the quick pair's row and both sleeping pairs to start in worker processes")
        assert proc.poll() is None, proc.communicate()
        workers = _worker_pids(tmp_path)
        assert set(workers) <= _children(proc.pid) and len(set(workers)) == 2
        # while the runner lives, a second runner (another process, another batch) is refused
        other = tmp_path / "other.toml"
        other.write_text(_factories(tmp_path) + _pair("other", "wrong_tuple"))
        assert main_batch([str(other), "--results", str(results), "--workers", "1", "--quiet"]) == 2
        err = capsys.readouterr().err
        assert str(results) in err and "--results" in err and len(err.strip().splitlines()) == 1
        os.kill(proc.pid, signal.SIGKILL)   # the runner only, not its process group
        proc.wait(timeout=30)
        t0 = time.monotonic()
        _wait_for(lambda: not any(_alive(p) for p in workers), 10, "the orphaned workers to exit")
        print(f"workers gone {time.monotonic() - t0:.1f} s after the runner was killed")
        assert [r["name"] for r in read_table(results)] == ["quick"]   # the finished row survived
        # the lock died with the runner (its lock file stays on disk): a new runner is accepted
        (tmp_path / "wake").write_text("")
        summary = run_batch(batch, results, workers=1, progress=False)
        assert [r["status"] for r in summary.rows] == ["bad input"] * 3
    finally:
        _cleanup(proc, tmp_path)


def test_second_runner_on_the_same_results_folder_is_refused(tmp_path, capsys):
    import threading

    first = tmp_path / "first.toml"
    first.write_text(_factories(tmp_path) + _pair("a", "sleeper", folder=str(tmp_path), label="a"))
    second = tmp_path / "second.toml"
    second.write_text(_factories(tmp_path) + _pair("b", "wrong_tuple"))
    results = tmp_path / "results"
    done = []
    thread = threading.Thread(target=lambda: done.append(run_batch(first, results, workers=1, progress=False)))
    thread.start()
    try:
        _wait_for(lambda: (tmp_path / "started-a").exists() or not thread.is_alive(), 60, "the first runner's pair")
        code = main_batch([str(second), "--results", str(results), "--workers", "1", "--quiet"])
    finally:
        (tmp_path / "wake").write_text("")
        thread.join(60)
    err = capsys.readouterr().err
    assert code == 2
    assert "in use" in err and str(results) in err and "--results" in err and "Traceback" not in err
    assert [r["name"] for r in read_table(results)] == ["a"] and len(done) == 1   # b never touched the table


def test_stale_lock_file_does_not_block(tmp_path):
    results = tmp_path / "results"
    results.mkdir()
    (results / LOCK_NAME).write_text("999999999\n")   # left behind by a dead runner: nobody holds it
    batch = tmp_path / "one.toml"
    batch.write_text(_factories(tmp_path) + _pair("one", "wrong_tuple"))
    summary = run_batch(batch, results, workers=1, progress=False)
    assert summary.total == 1 and len(read_table(results)) == 1


@pytest.mark.parametrize("first, second", [("k4/x", "k4_x"), ("Probe-A", "probe-a"), ("a b", "a_b")])
def test_pair_names_sharing_a_result_file_are_refused(first, second):
    spec = {"pair": [{"name": first, "system": "harmonic_3d"}, {"name": second, "system": "harmonic_3d"}]}
    with pytest.raises(BatchError) as info:
        load_batch(spec)
    assert repr(first) in str(info.value) and repr(second) in str(info.value)


def test_help_and_readme_say_a_batch_file_is_code(capsys):
    with pytest.raises(SystemExit) as info:
        main_batch(["--help"])
    assert info.value.code == 0
    text = " ".join(capsys.readouterr().out.split())
    assert "trust" in text and "python_path" in text and "imported and called" in text
    readme = (ROOT / "README.md").read_text()
    section = readme.split("## Batch runs", 1)[1].split("\n## ", 1)[0]
    assert "trust" in section and "python_path" in section and "imported and called" in section


@pytest.mark.parametrize("statuses, code", [(["ok", "ok"], 0), (["ok", "flagged"], 1),
                                            (["flagged", "bad input", "ok"], 2),
                                            (["bad input", "internal error", "flagged"], 3)])
def test_exit_code_is_the_most_severe_outcome(statuses, code):
    from fe_tool.batch import BatchSummary

    rows = [{"name": f"p{i}", "status": s, "flagged": s == "flagged"} for i, s in enumerate(statuses)]
    finished = sum(s in ("ok", "flagged") for s in statuses)
    summary = BatchSummary(name="t", results_dir=pathlib.Path("."), total=len(rows), ran=len(rows), skipped=0,
                           succeeded=finished, failed=len(rows) - finished, rows=rows, seconds=0.0)
    assert summary.exit_code == code


def test_each_pair_gets_an_outcome_and_the_others_go_on(tmp_path, capsys):
    bad_system = tmp_path / "bad_system.toml"
    bad_system.write_text("colour = 'blue'\n")
    batch = tmp_path / "mixed.toml"
    batch.write_text(_factories(tmp_path) + _pair("wrong-tuple", "wrong_tuple") + _pair("not-a-tuple", "not_a_tuple")
                     + _pair("factory-raises", "raises") + _pair("factory-exits", "exits")
                     + _pair("unknown-setting", "harmonic") + "settings = { budgte = 1000 }\n"
                     + "[[pair]]\nname = 'bad-system'\nsystem = 'bad_system.toml'\n"
                     + _pair("energy-raises", "energy_raises"))
    try:
        code = main_batch([str(batch), "--results", str(tmp_path / "out"), "--workers", "1", "--quiet"])
    except BaseException as err:   # the runner must not raise, not even SystemExit from a factory
        pytest.fail(f"main_batch raised {type(err).__name__}")
    out = capsys.readouterr()
    rows = {r["name"]: r for r in read_table(tmp_path / "out")}
    expected = {"wrong-tuple": ("bad input", "must return"), "not-a-tuple": ("bad input", "must return"),
                "factory-raises": ("bad input", "the factory itself failed"),
                "factory-exits": ("bad input", "sys.exit"), "unknown-setting": ("bad input", "budgte"),
                "bad-system": ("bad input", "bad_system.toml"), "energy-raises": ("bad input", "energy crashed")}
    assert {n: rows[n]["status"] for n in expected} == {n: e[0] for n, e in expected.items()}
    for name, (_, fragment) in expected.items():
        assert fragment in rows[name]["error"], (name, rows[name]["error"])
        assert sum(name + ":" in line for line in out.out.splitlines()) == 1   # one line per failed pair
    # an energy that fails at its start is refused before computing (bad input); the internal-error
    # outcome is covered by test_worker_that_dies_is_an_internal_error
    assert code == 2 and "Traceback" not in out.out + out.err


def test_worker_that_dies_is_an_internal_error(tmp_path):
    batch = tmp_path / "dies.toml"
    # two pairs, so that two worker processes run them (a single pair would run in this process)
    batch.write_text(_factories(tmp_path) + _pair("dies", "dies") + _pair("other", "wrong_tuple"))
    summary = run_batch(batch, tmp_path / "out", workers=2, progress=False)
    assert summary.rows[0]["status"] == "internal error" and "worker" in summary.rows[0]["error"]
    assert summary.exit_code == 3


def test_rerun_skips_finished_pairs_and_retries_failed_ones(tmp_path):
    import json

    batch = tmp_path / "four.toml"
    names = ["was-ok", "was-flagged", "was-bad", "was-internal"]
    batch.write_text(_factories(tmp_path) + "".join(_pair(n, "wrong_tuple") for n in names))
    _, tasks = load_batch(batch)
    out = tmp_path / "out"
    out.mkdir()
    earlier = [{"name": t.name, "hash": t.content_hash, "status": s, "flagged": s == "flagged", "delta_f": 1.0,
                "stderr": 0.1, "error": ""} for t, s in zip(tasks, ["ok", "flagged", "bad input", "internal error"])]
    (out / "results.jsonl").write_text("".join(json.dumps(r) + "\n" for r in earlier))
    kept = run_batch(batch, out, workers=1, progress=False, retry_failed=False)
    assert kept.skipped == 4 and kept.ran == 0 and kept.exit_code == 3
    again = run_batch(batch, out, workers=1, progress=False)
    assert again.skipped == 2 and again.ran == 2
    assert [r["status"] for r in again.rows] == ["ok", "flagged", "bad input", "bad input"]
    assert again.rows[0]["delta_f"] == 1.0 and again.exit_code == 2
    assert main_batch([str(batch), "--results", str(out), "--quiet", "--no-retry"]) == 2


def test_interrupt_returns_130_and_keeps_finished_rows(tmp_path, capsys):
    batch = tmp_path / "interrupted.toml"
    batch.write_text(_factories(tmp_path) + _pair("first", "wrong_tuple") + _pair("second", "interrupts")
                     + _pair("third", "wrong_tuple"))
    try:
        code = main_batch([str(batch), "--results", str(tmp_path / "out"), "--workers", "1", "--quiet"])
    except KeyboardInterrupt:
        code = "raised KeyboardInterrupt"
    err = capsys.readouterr().err
    assert code == 130 and "interrupted" in err and "Traceback" not in err
    assert [r["name"] for r in read_table(tmp_path / "out")] == ["first"]


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="finds worker processes through /proc (Linux)")
def test_sigint_stops_the_workers_and_keeps_finished_rows(tmp_path):
    # (a rerun skipping finished ok rows after Ctrl-C: test_pool_dask_resume_and_failure, part 3)
    batch = _sleepers_batch(tmp_path, first=_pair("quick", "wrong_tuple"))
    results = tmp_path / "results"
    proc = _start_runner(batch, results, workers=2)
    try:
        _wait_for(lambda: (all((tmp_path / f"started-{s}").exists() for s in ("s1", "s2"))
                           and len(read_table(results)) == 1) or proc.poll() is not None,
                  90, "the quick pair's row and both sleeping pairs to start in worker processes")
        workers = _worker_pids(tmp_path)
        assert proc.poll() is None
        t0 = time.monotonic()
        os.kill(proc.pid, signal.SIGINT)   # what Ctrl-C sends (here to the runner alone)
        out, err = proc.communicate(timeout=30)
        print(f"runner stopped {time.monotonic() - t0:.1f} s after SIGINT")
        assert proc.returncode == 130 and "interrupted" in err and "Traceback" not in err
        assert not any(_alive(p) for p in workers)   # stopped by the runner, not left to finish
    finally:
        _cleanup(proc, tmp_path)
    assert [(r["name"], r["status"]) for r in read_table(results)] == [("quick", "bad input")]


# ------------------------------------------------------------------ malformed batch input (fuzz table)
# Each case: a batch file (or command line) that must be refused with one line of the tool's own
# message and the right exit status, never a traceback.  "SECRET" marks file content that must
# never be echoed.  Cases whose refusal is a pair's row ("bad input") print one line for that pair.

def _file(d: pathlib.Path, text, name: str = "batch.toml") -> str:
    path = d / name
    path.write_bytes(text if isinstance(text, bytes) else text.encode())
    return str(path)


def _with_factories(d: pathlib.Path, text: str) -> str:
    return _file(d, _factories(d) + text)


def _broken_package(d: pathlib.Path) -> str:
    (d / "broken_pkg").mkdir()
    (d / "broken_pkg" / "__init__.py").write_text("raise RuntimeError('package refuses to import')\n")
    return _file(d, f"python_path = ['{d}']\n[[pair]]\nname = 'p'\nfactory = 'broken_pkg.mod:f'\n")


def _unwritable(d: pathlib.Path) -> str:
    folder = d / "read-only"
    folder.mkdir()
    folder.chmod(0o555)
    # root ignores permission bits: use a folder no one can create files in
    return str(folder) if not os.access(folder, os.W_OK) else "/proc/self"


def _large(d: pathlib.Path) -> str:
    path = d / "large.toml"
    with open(path, "wb") as fh:
        fh.truncate(5 * 2 ** 20)   # sparse: costs no disk
    return str(path)


SYSTEM_PAIR = "[[pair]]\nname = 'p'\nsystem = 'harmonic_3d'\n"
SCAN = f"[[scan]]\nfactory = '{FACTORY_MODULE}:wrong_tuple'\nvary = {{ k = [1, 2] }}\n"
FUZZ = [  # id, builder(folder) -> batch path, extra options, expected fragment, exit status
    ("not TOML", lambda d: _file(d, "name = = 'x'  # SECRET\n"), [], "is not valid TOML", 2),
    ("not UTF-8", lambda d: _file(d, b"\xff\xfe name = 'SECRET'\n"), [], "is not UTF-8 text", 2),
    ("empty file", lambda d: _file(d, ""), [], "lists no pairs", 2),
    ("unknown top-level key", lambda d: _file(d, "nmae = 'SECRET'\n" + SYSTEM_PAIR), [], "unknown key(s) ['nmae']", 2),
    ("unknown pair key", lambda d: _file(d, "[[pair]]\nname = 'p'\nsytem = 'SECRET'\n"), [],
     "unknown key(s) ['sytem']", 2),
    ("pair not a list of tables", lambda d: _file(d, "pair = 'SECRET'\n"), [], "pair: expected a list of tables", 2),
    ("pair name not a string", lambda d: _file(d, "[[pair]]\nname = 5\nsystem = 'harmonic_3d'\n"), [],
     "expected a non-empty string, got an integer", 2),
    ("settings not a table", lambda d: _file(d, SYSTEM_PAIR + "settings = 'SECRET'\n"), [],
     "expected a table of estimate() options, got a string", 2),
    ("python_path not a list", lambda d: _file(d, "python_path = 'SECRET'\n" + SYSTEM_PAIR), [],
     "python_path: expected a list of folder names, got a string", 2),
    ("python_path folder missing", lambda d: _file(d, "python_path = ['no-such-folder']\n" + SYSTEM_PAIR), [],
     "'no-such-folder' is not a folder", 2),
    ("seed not an integer", lambda d: _file(d, "[defaults]\nseed = 'SECRET'\n" + SYSTEM_PAIR), [],
     "seed must be an integer, got a string", 2),
    ("missing system file", lambda d: _file(d, "[[pair]]\nname = 'p'\nsystem = 'no_such_system.toml'\n"), [],
     "is neither a file beside the batch file", 2),
    ("system and factory both", lambda d: _file(d, SYSTEM_PAIR + "factory = 'a:b'\n"), [], "give exactly one of", 2),
    ("factory without a colon", lambda d: _file(d, "[[pair]]\nname = 'p'\nfactory = 'SECRET'\n"), [],
     "expected 'module:function'", 2),
    ("factory module missing", lambda d: _file(d, "[[pair]]\nname = 'p'\nfactory = 'no_such_module_fe:f'\n"), [],
     "module 'no_such_module_fe' cannot be found", 2),
    ("factory package fails to import", _broken_package, [], "module 'broken_pkg.mod' cannot be found", 2),
    ("factory returns a wrong tuple", lambda d: _with_factories(d, _pair("p", "wrong_tuple")), [],
     "must return (energy_a, energy_b, start_a, start_b, kT)", 2),
    ("factory returns no tuple", lambda d: _with_factories(d, _pair("p", "not_a_tuple")), [],
     "it returned a string", 2),
    ("unknown setting", lambda d: _with_factories(d, _pair("p", "harmonic") + "settings = { budgte = 1 }\n"), [],
     "unknown setting(s) ['budgte']", 2),
    ("template names a missing key", lambda d: _with_factories(d, SCAN + "name = 'k{missing}'\n"), [],
     "the name template cannot be filled from the keys ['k']", 2),
    ("template with a lone brace", lambda d: _with_factories(d, SCAN + "name = 'k{'\n"), [],
     "the name template cannot be filled", 2),
    ("template not a string", lambda d: _with_factories(d, SCAN + "name = 5\n"), [],
     "expected a name template string", 2),
    ("vary not lists", lambda d: _with_factories(d, SCAN.replace("[1, 2]", "1") + "name = 'k{k}'\n"), [],
     "vary: expected a table of non-empty lists", 2),
    ("seeds not integers", lambda d: _with_factories(d, SCAN + "name = 'k{k}'\nseeds = ['SECRET']\n"), [],
     "seeds: expected a non-empty list of integers", 2),
    ("duplicate names", lambda d: _with_factories(d, SCAN + "name = 'same'\n"), [],
     "'same' appears more than once", 2),
    ("names equal as file names",
     lambda d: _with_factories(d, _pair("k4/x", "wrong_tuple") + _pair("k4_x", "wrong_tuple")),
     [], "pairs 'k4/x' and 'k4_x' would share one result file", 2),
    ("names equal but for case",
     lambda d: _with_factories(d, _pair("Probe", "wrong_tuple") + _pair("probe", "wrong_tuple")),
     [], "pairs 'Probe' and 'probe' would share one result file", 2),
    ("pair name too long", lambda d: _with_factories(d, _pair("x" * 200, "wrong_tuple")), [],
     "a pair name is at most 120 characters", 2),
    ("results path is a file", lambda d: _with_factories(d, _pair("p", "wrong_tuple")),
     lambda d: ["--results", _file(d, "SECRET", "taken.txt")], "is a file, not a folder", 2),
    ("results folder not writable", lambda d: _with_factories(d, _pair("p", "wrong_tuple")),
     lambda d: ["--results", _unwritable(d)], "is not writable", 2),
    ("results folder under a file", lambda d: _with_factories(d, _pair("p", "wrong_tuple")),
     lambda d: ["--results", _file(d, "SECRET", "taken.txt") + "/sub"], "cannot create the results folder", 2),
    ("batch file is /dev/zero", lambda d: "/dev/zero", [], "is not a regular file", 2),
    ("batch file is a folder", lambda d: str(d), [], "is not a regular file", 2),
    ("batch file too large", _large, [], "is larger than 4 MiB", 2),
    ("no batch file", lambda d: str(d / "missing.toml"), [], "no batch file", 2),
    ("zero workers", lambda d: _with_factories(d, _pair("p", "wrong_tuple")), ["--workers", "0"],
     "workers must be a positive whole number", 2),
]


@pytest.mark.parametrize("case, build, extra, fragment, code", FUZZ, ids=[c[0] for c in FUZZ])
def test_malformed_batch_input_is_refused_in_one_line(case, build, extra, fragment, code, tmp_path, capsys):
    batch = build(tmp_path)
    options = extra(tmp_path) if callable(extra) else extra
    if "--results" not in options:
        options = ["--results", str(tmp_path / "out"), *options]
    if "--workers" not in options:
        options = [*options, "--workers", "1"]
    assert main_batch([batch, *options, "--quiet"]) == code
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err and "SECRET" not in out + err
    if err:   # refused as a whole, before anything ran
        assert len(err.strip().splitlines()) == 1 and err.startswith("fe-tool batch: error: ") and fragment in err, err
        assert out == ""
    else:     # refused as the pair's row: one line names the pair and the reason
        lines = [line for line in out.splitlines() if fragment in line]
        assert len(lines) == 1 and lines[0].startswith("  bad input: p: "), out
