"""System files (parsing, errors naming the key, units, old key names) and the fe-tool command line.

Independent references, each named beside its check: CODATA 2018 / SI 2019 constants typed in
here (Tiesinga, Mohr, Newell & Taylor 2021, Rev. Mod. Phys. 93, 025010); the thermochemical
calorie, 1 kcal = 4.184 kJ exactly (by definition); a file in kcal/mol must give the same reduced
energies u = U/kT as the same file in kJ/mol (energies are unit-free once divided by kT).
"""
import copy
import json
import math

import jax.numpy as jnp
import numpy as np
import pytest

from fe_tool import units
from fe_tool.cli import main
from fe_tool.systemfile import SystemFileError, first_sentence, list_systems, load_system, parse_system
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
    assert data["settings"]["system"] == "harmonic-3d"   # the file's name travels with the result (plot titles)


def test_cli_list_and_bad_file(tmp_path, capsys):
    assert main(["list"]) == 0
    listing = capsys.readouterr().out
    assert "harmonic_3d" in listing
    for path in list_systems():   # each description's first sentence is printed whole, never cut
        sentence = first_sentence(load_system(path).description)
        assert sentence.endswith((".", "!", "?")) and len(sentence) > 20, (path.stem, sentence)
        assert any(line.startswith(path.stem) and line.endswith(sentence) for line in listing.splitlines()), path
    bad = tmp_path / "bad.toml"
    bad.write_text('units = "reduced"\n[end_a]\nfield = "harmonic"\nstiffness = "x"\nstart = [0.0]\n'
                   '[end_b]\nfield = "harmonic"\nstiffness = [2.0]\nstart = [0.0]\n')
    assert main(["run", str(bad)]) == 2
    assert "end_a.stiffness" in capsys.readouterr().err
    assert main(["run", "no_such_system"]) == 2


def test_first_sentence_is_whole():
    text = "A chain (Ryckaert & Bellemans 1978, Faraday Discuss. Chem. Soc. 66, 95) at 300 K.\nIt is cheap."
    assert first_sentence(text) == "A chain (Ryckaert & Bellemans 1978, Faraday Discuss. Chem. Soc. 66, 95) at 300 K."
    assert first_sentence("Soft core (Beutler et al. 1994, e.g. α = 0.5). Next.") == \
        "Soft core (Beutler et al. 1994, e.g. α = 0.5)."
    assert first_sentence("no full stop at all") == "no full stop at all"


# ------------------------------------------------------------------ one unit vocabulary for both layouts

def test_coulomb_constant_in_each_unit_system_from_si_values():
    # SI 2019 exact e and N_A; CODATA 2018 ε0 (Tiesinga et al. 2021, Rev. Mod. Phys. 93, 025010)
    e, avogadro, epsilon0 = 1.602176634e-19, 6.02214076e23, 8.8541878128e-12
    joule_metre = avogadro * e**2 / (4.0 * math.pi * epsilon0)       # J m / mol per e²
    kj_nm = joule_metre / 1000.0 * 1e9
    kcal_nm = joule_metre / 4184.0 * 1e9                              # 1 kcal = 4184 J (thermochemical calorie)
    assert units.unit_system("kJ/mol-nm-K").coulomb_constant == pytest.approx(kj_nm, rel=1e-14)
    assert units.unit_system("kcal/mol-nm-K").coulomb_constant == pytest.approx(kcal_nm, rel=1e-14)
    assert units.unit_system("reduced").coulomb_constant == 1.0
    # 138.935458 kJ mol⁻¹ nm e⁻² and 332.0637 kcal mol⁻¹ Å e⁻² (from memory), to the digits quoted
    assert kj_nm == pytest.approx(138.935458, abs=5e-7)
    assert kcal_nm * 10.0 == pytest.approx(332.0637, abs=5e-5)
    # R = N_A k_B (both exact): kT in kcal/mol at 300 K
    assert units.unit_system("kcal/mol-nm-K").kT(300.0) == pytest.approx(avogadro * 1.380649e-23 * 300.0 / 4184.0,
                                                                          rel=1e-14)


CHARGED_CHAIN = {  # kJ/mol, nm, e: LJ, charges, reaction field, bonded terms, weighted pairs three bonds apart
    "units": "kJ/mol", "temperature": 310.0,
    "particles": {"types": ["A", "B", "B", "A", "C"],
                  "positions": [[0.0, 0.0, 0.0], [0.127, 0.086, 0.0], [0.254, 0.0, 0.0], [0.38, 0.086, 0.02],
                                [0.6, 0.3, 0.2]]},
    "box": {"edges": [2.0, 2.1, 2.2]},
    "types": {"A": {"sigma": 0.35, "epsilon": 0.8, "charge": 0.3}, "B": {"sigma": 0.3, "epsilon": 0.5, "charge": -0.3},
              "C": {"sigma": 0.32, "epsilon": 0.6, "charge": 0.1}},
    "nonbonded": {"cutoff": 0.9, "reaction_field": {"outer_permittivity": 60.0}, "relative_permittivity": 1.5,
                  "three_bonds_apart": {"lj_weight": 0.5, "coulomb_weight": 0.8333}},
    "topology": {"bonds": [{"name": "b", "atoms": [[0, 1], [1, 2], [2, 3]], "length": 0.153, "force_constant": 2000.0}],
                 "angles": [{"name": "a", "atoms": [[0, 1, 2], [1, 2, 3]], "angle": 112.0, "force_constant": 50.0}],
                 "torsions": [{"name": "t", "atoms": [[0, 1, 2, 3]], "form": "periodic", "force_constants": [2.0, 1.0],
                               "multiplicities": [3, 1], "phases": [0.0, 180.0]}]},
    "restraints": [{"name": "d", "form": "distance", "atoms": [[0, 4]], "lower": 0.3, "upper": 0.6,
                    "force_constant": 100.0}],
    "change": {"decouple": [4], "parameters": [{"group": "a", "angle": 120.0, "force_constant": 80.0}]},
}


def _in_kcal(data):
    """The same system with every energy parameter divided by 4.184 (kJ -> kcal)."""
    kcal = copy.deepcopy(data)
    kcal["units"] = "kcal/mol"
    for spec in kcal["types"].values():
        spec["epsilon"] /= 4.184
    topology = kcal["topology"]
    topology["bonds"][0]["force_constant"] /= 4.184
    topology["angles"][0]["force_constant"] /= 4.184
    topology["torsions"][0]["force_constants"] = [k / 4.184 for k in topology["torsions"][0]["force_constants"]]
    kcal["restraints"][0]["force_constant"] /= 4.184
    kcal["change"]["parameters"][0]["force_constant"] /= 4.184
    return kcal


def _reduced_energies(system, count=3):
    rng = np.random.default_rng(7)
    out = []
    for _ in range(count):
        x = jnp.asarray(system.start_a + 0.01 * rng.normal(size=system.start_a.shape))
        out += [float(system.energy_a(x)) / system.kT, float(system.energy_b(x)) / system.kT]
        out += [float(system.path.energy(x, jnp.asarray(lam))) for lam in (0.3, 0.7)]
    return np.asarray(out)


def test_particle_files_in_kcal_per_mol_give_the_same_reduced_energies():
    kj = parse_system(copy.deepcopy(CHARGED_CHAIN))
    kcal = parse_system(_in_kcal(CHARGED_CHAIN))
    assert (kj.units, kj.unit_system, kcal.units, kcal.unit_system) == ("kJ/mol", "kJ/mol-nm-K", "kcal/mol",
                                                                         "kcal/mol-nm-K")
    assert kj.kT == pytest.approx(4.184 * kcal.kT, rel=1e-14)
    np.testing.assert_allclose(_reduced_energies(kcal), _reduced_energies(kj), rtol=1e-11)
    assert kcal.unit_label() == "kcal/mol" and kj.unit_label() == "kJ/mol"


# ------------------------------------------------------------------ old key names: read for one release, with a notice

OLD_KEYS = [  # (how the old file says it, the new key the notice must name)
    ((("units",), "kJ/mol-nm-K"), 'units = "kJ/mol"'),
    ((("nonbonded", "reaction_field_dielectric"), 60.0), "nonbonded.reaction_field.outer_permittivity"),
    ((("nonbonded", "dielectric"), 1.5), "nonbonded.relative_permittivity"),
    ((("nonbonded", "scale_14_lj"), 0.5), "nonbonded.three_bonds_apart.lj_weight"),
    ((("nonbonded", "scale_14_coulomb"), 0.8333), "nonbonded.three_bonds_apart.coulomb_weight"),
]


def _old_spelling(keys, value):
    data = copy.deepcopy(CHARGED_CHAIN)
    nonbonded = data["nonbonded"]
    if keys[-1] == "reaction_field_dielectric":
        del nonbonded["reaction_field"]
    elif keys[-1] == "dielectric":
        del nonbonded["relative_permittivity"]
    elif keys[-1].startswith("scale_14"):
        del nonbonded["three_bonds_apart"]["lj_weight" if keys[-1].endswith("lj") else "coulomb_weight"]
    return edited(data, keys, value)


@pytest.mark.parametrize("old, new", OLD_KEYS, ids=[new for _, new in OLD_KEYS])
def test_old_key_names_still_work_with_a_notice_naming_the_file_and_the_new_key(tmp_path, old, new):
    data = _old_spelling(*old)
    with pytest.warns(FutureWarning, match=r"^<dict>: .*write " + new.replace(".", r"\.") + " instead"):
        system = parse_system(data)
    np.testing.assert_array_equal(_reduced_energies(system, 1), _reduced_energies(parse_system(CHARGED_CHAIN), 1))
    file = tmp_path / "old.toml"   # from a file, the notice names the file
    file.write_text('units = "kJ/mol-nm-K"\ntemperature = 300.0\n[particles]\ntypes = ["A", "A"]\n'
                    "positions = [[0.0, 0.0, 0.0], [0.3, 0.0, 0.0]]\n"
                    '[[restraints]]\nform = "position"\natoms = [0]\nforce_constant = 10.0\nstate = "a"\n')
    with pytest.warns(FutureWarning, match=str(file).replace(".", r"\.") + ': units = "kJ/mol-nm-K" is an old name'):
        assert load_system(file).units == "kJ/mol"


def test_old_and_new_name_together_are_refused():
    data = edited(CHARGED_CHAIN, ("nonbonded", "scale_14_lj"), 0.5)
    with pytest.warns(FutureWarning), pytest.raises(SystemFileError, match=r"nonbonded\.scale_14_lj: the old name of "
                                                                            r"nonbonded\.three_bonds_apart\.lj_weight"):
        parse_system(data)


@pytest.mark.parametrize("keys, value, message", [
    (("nonbonded", "reaction_field"), 78.0, "nonbonded.reaction_field: expected a table"),
    (("nonbonded", "reaction_field"), {"outer_permittivity": -1.0}, "nonbonded.reaction_field.outer_permittivity"),
    (("nonbonded", "reaction_field"), {"epsilon": 5.0}, "nonbonded.reaction_field: unknown key"),
    (("nonbonded", "three_bonds_apart"), {"lj_weight": "half"}, "nonbonded.three_bonds_apart.lj_weight"),
    (("nonbonded", "three_bonds_apart"), {"scale": 0.5}, "nonbonded.three_bonds_apart: unknown key"),
    (("nonbonded", "exclude_bonded"), 2, "nonbonded.three_bonds_apart: expected no nonzero weight"),
    (("nonbonded", "relative_permittivity"), 0.0, "nonbonded.relative_permittivity"),
    (("restraints", 0, "upper"), 0.2, "restraints[0].upper: expected upper ≥ lower"),
    (("restraints", 0, "target"), 0.4, "restraints[0].lower: expected no lower/upper together with target"),
])
def test_new_nonbonded_keys_are_checked(keys, value, message):
    with pytest.raises(SystemFileError, match=message.replace(".", r"\.").replace("[", r"\[").replace("]", r"\]")):
        parse_system(edited(CHARGED_CHAIN, keys, value))
