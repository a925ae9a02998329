"""System files (parsing, errors naming the key) and the fe-tool command line."""
import json

import numpy as np
import pytest

from fe_tool.cli import main
from fe_tool.systemfile import SystemFileError, list_systems, load_system, parse_system
from nested_edit import edited

MINIMAL = {
    "units": "reduced", "kT": 1.0,
    "end_a": {"field": "harmonic", "stiffness": [1.0], "start": [0.0]},
    "end_b": {"field": "harmonic", "stiffness": [4.0], "centre": [1.5], "start": [1.5]},
}


def _with(path_keys, value):
    return edited(MINIMAL, path_keys, value)


@pytest.mark.parametrize("keys, value, message", [
    (("end_a", "stiffness"), "stiff", "end_a.stiffness"),
    (("end_a", "stiffness"), [-1.0], "end_a.stiffness: expected positive"),
    (("end_b", "field"), "quartic", "end_b.field"),
    (("end_b", "spring"), 3.0, "end_b: unknown key"),
    (("end_b", "start"), [0.0, 1.0], "end_b.start"),
    (("end_a",), KeyError, "end_a: missing"),
    (("units",), "eV", "units"),
    (("kT",), -1.0, "kT"),
    (("temperature",), 300.0, "temperature"),
    (("settings",), {"budgett": 5}, "settings: unknown key"),
    (("reference",), {"delta_f": "x"}, "reference.delta_f"),
])
def test_malformed_files_name_the_key(keys, value, message):
    with pytest.raises(SystemFileError, match=message.replace(".", r"\.")):
        parse_system(_with(keys, value))


def test_kj_per_mol_file_gives_kT_from_codata_gas_constant():
    data = dict(MINIMAL, units="kJ/mol", temperature=298.15)
    del data["kT"]
    system = parse_system(data)
    # kT at 298.15 K = 2.478957029602389 kJ/mol (CODATA 2018 R; docs/references.md §2)
    assert abs(system.kT - 2.478957029602389) < 1e-12


def test_every_bundled_system_parses_with_a_reference_and_source():
    files = list_systems()
    assert len(files) >= 4
    for f in files:
        system = load_system(f)
        assert system.start_a.shape == system.start_b.shape
        if system.reference is not None:
            assert system.reference["source"] and np.isfinite(system.reference["delta_f"])


def test_cli_run_writes_json_with_reference(tmp_path, capsys):
    out = tmp_path / "result.json"
    code = main(["run", "harmonic_3d", "--json", str(out), "--budget", "300000", "--quiet"])
    text = capsys.readouterr().out
    assert "ΔF = F_B − F_A" in text and "experimental validation" in text
    data = json.loads(out.read_text())
    # closed form 1.5 ln 10 (Tuckerman 2010, OUP)
    assert data["reference"]["delta_f"] == pytest.approx(1.5 * np.log(10.0), abs=1e-12)
    assert abs(data["delta_f"] - data["reference"]["delta_f"]) <= max(0.1, 4 * data["stderr"])
    assert code == 0 and not data["flagged"]   # a right answer on a bundled file is not flagged


def test_cli_list_and_bad_file(tmp_path, capsys):
    assert main(["list"]) == 0
    assert "harmonic_3d" in capsys.readouterr().out
    bad = tmp_path / "bad.toml"
    bad.write_text('units = "reduced"\n[end_a]\nfield = "harmonic"\nstiffness = "x"\nstart = [0.0]\n'
                   '[end_b]\nfield = "harmonic"\nstiffness = [2.0]\nstart = [0.0]\n')
    assert main(["run", str(bad)]) == 2
    assert "end_a.stiffness" in capsys.readouterr().err
    assert main(["run", "no_such_system"]) == 2
