"""The network of a batch on disk: state labels in batch files, `fe-tool network` on a results
table (exit codes, tables, picture, the suggested pair entry), without computing any pair."""
import csv
import json

import numpy as np
import pytest

from fe_tool.batch import BatchError, load_batch
from fe_tool.cli import main
from fe_tool.exitcodes import EXIT_BAD_INPUT, EXIT_FLAGGED, EXIT_OK

TRUE_VALUES = {"site": 0.0, "k1": 0.4, "k2": 0.9, "k3": 1.6, "k4": 2.0, "k5": 2.9}
PAIRS = [("site", "k1"), ("k1", "k2"), ("k2", "k3"), ("k3", "k4"), ("k4", "k5"), ("site", "k2"), ("k1", "k3"),
         ("k2", "k4"), ("k3", "k5"), ("site", "k5")]


def _write_table(folder, offset_on=None, seed=0):
    """A results.jsonl as a batch run writes it, with ΔF drawn around invented exact values."""
    rng = np.random.default_rng(seed)
    rows = []
    for k, (a, b) in enumerate(PAIRS):
        value = TRUE_VALUES[b] - TRUE_VALUES[a] + 0.05 * rng.normal() + (1.0 if k == offset_on else 0.0)
        rows.append({"name": f"{a}-{b}", "hash": f"h{k}", "delta_f": value, "stderr": 0.05, "units": "kT",
                     "estimator": "bar", "flagged": False, "warnings": 0, "evaluations": 100000, "seconds": 1.0,
                     "status": "ok", "error": None, "source": "x:y", "state_a": a, "state_b": b})
    rows.append({"name": "broken", "hash": "hb", "status": "internal error", "state_a": "site", "state_b": "k9"})
    folder.mkdir(exist_ok=True)
    (folder / "results.jsonl").write_text("".join(json.dumps(r) + "\n" for r in rows))
    return folder


def test_network_command_on_a_consistent_table(tmp_path, capsys):
    folder = _write_table(tmp_path / "run")
    assert main(["network", str(folder), "--reference", "site", "--target", "site,k5"]) == EXIT_OK
    out = capsys.readouterr().out
    assert "verdict: consistent" in out and "left out (not finished): broken" in out
    assert "[[pair]]" in out and 'states = ["' in out
    with open(folder / "network_states.csv") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["state"] for r in rows] == list(TRUE_VALUES)
    for r in rows:   # within 5σ of the invented values (5σ two-sided misses once in 1.7e6)
        assert abs(float(r["value"]) - TRUE_VALUES[r["state"]]) <= 5 * float(r["stderr"]) + 1e-12
    data = json.loads((folder / "network.json").read_text())
    assert len(data["cycles"]) == len(PAIRS) - (len(TRUE_VALUES) - 1)
    assert np.asarray(data["covariance"]).shape == (6, 6) and data["next_pairs"]
    assert (folder / "network_cycles.csv").is_file() and (folder / "network.png").stat().st_size > 10_000


def test_network_command_flags_and_names_a_corrupted_pair(tmp_path, capsys):
    folder = _write_table(tmp_path / "run", offset_on=2)      # k2-k3 off by 20 of its errors
    assert main(["network", str(folder), "--no-plot", "--anchor", "site=1.0"]) == EXIT_FLAGGED
    out = capsys.readouterr().out
    assert "pair k2-k3 (k2 -> k3) disagrees" in out and "SUSPECT" in out
    assert not (folder / "network.png").exists()
    data = json.loads((folder / "network.json").read_text())
    assert data["suspects"][0] == "k2-k3" and data["nodes"][0]["value"] == 1.0


def test_network_command_refuses_a_folder_without_named_states(tmp_path, capsys):
    assert main(["network", str(tmp_path)]) == EXIT_BAD_INPUT
    assert "no results table" in capsys.readouterr().err
    (tmp_path / "results.jsonl").write_text(json.dumps({"name": "p", "status": "ok", "delta_f": 1.0,
                                                        "stderr": 0.1}) + "\n")
    assert main(["network", str(tmp_path)]) == EXIT_BAD_INPUT
    assert "names its states" in capsys.readouterr().err


def test_batch_file_states_are_read_filled_and_checked(tmp_path):
    spec = {"name": "ladder", "python_path": [], "pair": [
        {"name": "p", "factory": "examples.restraint_scan:probe_restraint", "states": ["site", "k1"]}],
        "scan": [{"name": "k{stiffness}", "factory": "examples.restraint_scan:probe_restraint",
                  "vary": {"stiffness": [2.0, 4.0]}, "states": ["site", "k{stiffness}"]}]}
    import sys
    import pathlib

    sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent.parent))
    try:
        _, tasks = load_batch(spec)
        assert [t.states for t in tasks] == [("site", "k1"), ("site", "k2.0"), ("site", "k4.0")]
        plain = dict(spec, pair=[{k: v for k, v in spec["pair"][0].items() if k != "states"}], scan=[])
        assert load_batch(plain)[1][0].states is None
        assert load_batch(plain)[1][0].content_hash != tasks[0].content_hash
        for bad in (["site"], ["a", "a"], "site", ["a", 3]):
            with pytest.raises(BatchError, match="two different state labels"):
                load_batch(dict(spec, pair=[dict(spec["pair"][0], states=bad)], scan=[]))
    finally:
        sys.path.pop(0)
