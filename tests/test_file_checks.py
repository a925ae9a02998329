"""Reading user-named files: system files, the XYZ files they name, and saved control files.

What is checked: data paths stay inside the system file's folder unless allowed; only regular
files of bounded size are read; every value of the wrong type is refused naming its key;
error messages never repeat file contents (a marker planted in the file never appears);
damaged control files (truncated, trailing bytes, NaN weights, a broken λ schedule, ...)
are refused at load with a ControlFileError naming the file. The expected behaviour is the
module docstrings' contract, so there is no outside source to cite; the values are written
out here.
"""
from __future__ import annotations

import copy
import json
import os

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np
import pytest

from fe_tool.systemfile import reader as systemfile_reader
from fe_tool.control import (ControlFileError, ControlScales, MLPControl, check_control_fits, load_control,
                             read_control_header, save_control, system_fingerprint)
from fe_tool.control import storage
from fe_tool.path import LinearPath
from fe_tool.systemfile import SystemFileError, load_system, parse_system
from nested_edit import edited

MARKER = "ZQXmarker"  # planted in files; must never appear in an error message

FIELD = {
    "units": "reduced", "kT": 1.0,
    "end_a": {"field": "harmonic", "stiffness": [1.0], "start": [0.0]},
    "end_b": {"field": "harmonic", "stiffness": [4.0], "centre": [1.5], "start": [1.5]},
}
PARTICLES = {  # two LJ particles in a periodic box, one decoupled, one bond group
    "units": "reduced", "kT": 2.0,
    "particles": {"types": ["LJ", "LJ"], "positions": [[1.0, 1.0, 1.0], [2.2, 1.0, 1.0]]},
    "box": {"edges": [6.0, 6.0, 6.0]},
    "types": {"LJ": {"sigma": 1.0, "epsilon": 1.0, "charge": 0.0}},
    "nonbonded": {"cutoff": 2.5, "exclude_bonded": 0},
    "topology": {"bonds": [{"name": "b", "atoms": [[0, 1]], "length": 1.2, "force_constant": 10.0}]},
    "change": {"decouple": [0]},
}
XYZ_SYSTEM = """units = "reduced"
kT = 2.0
[particles]
file = "{file}"
[box]
edges = [6.0, 6.0, 6.0]
[types.LJ]
sigma = 1.0
epsilon = 1.0
[nonbonded]
cutoff = 2.5
[change]
decouple = [0]
"""
GOOD_XYZ = "2\ntwo LJ particles\nLJ 1.0 1.0 1.0\nLJ 2.2 1.0 1.0\n"


def _strings_in(value) -> list[str]:
    if isinstance(value, str):
        return [value]
    if isinstance(value, list):
        return [s for v in value for s in _strings_in(v)]
    if isinstance(value, dict):
        return [s for v in value.values() for s in _strings_in(v)]
    return []


def _refused(data: dict, key: str) -> str:
    with pytest.raises(SystemFileError) as info:
        parse_system(data)
    message = str(info.value)
    assert message.startswith(key) or f"{key}:" in message, message
    return message


# ------------------------------------------------------------------ 1. data paths, file kinds, sizes

def _system_in(folder, file_value: str):
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "system.toml"
    path.write_text(XYZ_SYSTEM.format(file=file_value))
    return path


def test_xyz_path_outside_the_folder_is_refused_without_echo(tmp_path):
    secret = tmp_path / "secret.txt"
    secret.write_text(f"root:x:0:0:{MARKER}:/root:/bin/bash\n")
    inner = tmp_path / "a" / "b"
    for written in ("../../secret.txt", str(secret), "../../../../../../../../" + str(secret).lstrip("/")):
        system = _system_in(inner, written)
        with pytest.raises(SystemFileError, match="particles.file: .*lies outside the folder") as info:
            load_system(system)
        assert MARKER not in str(info.value)
    # explicitly allowed: the file is read, but its unreadable first line is not repeated
    with pytest.raises(SystemFileError, match="line 1: expected the particle count") as info:
        load_system(system, allow_outside_files=True)
    assert MARKER not in str(info.value)


def test_symlinks_are_resolved_before_the_folder_check(tmp_path):
    outside = tmp_path / "outside.xyz"
    outside.write_text(GOOD_XYZ)
    inner = tmp_path / "inner"
    inner.mkdir()
    (inner / "link.xyz").symlink_to(outside)
    (inner / "real.xyz").write_text(GOOD_XYZ)
    (inner / "inside_link.xyz").symlink_to(inner / "real.xyz")
    with pytest.raises(SystemFileError, match="lies outside the folder"):
        load_system(_system_in(inner, "link.xyz"))
    assert load_system(_system_in(inner, "link.xyz"), allow_outside_files=True).start_a.shape == (2, 3)
    assert load_system(_system_in(inner, "inside_link.xyz")).start_a.shape == (2, 3)
    assert load_system(_system_in(inner, "./sub/../real.xyz")).start_a.shape == (2, 3)


def test_devices_folders_and_pipes_are_refused_unread(tmp_path):
    inner = tmp_path / "inner"
    inner.mkdir()
    (inner / "folder.xyz").mkdir()
    os.mkfifo(inner / "pipe.xyz")  # opening a FIFO for reading would block forever
    cases = [("/dev/zero", "a character device"), ("folder.xyz", "a folder"), ("pipe.xyz", r"a pipe \(FIFO\)")]
    for written, kind in cases:
        with pytest.raises(SystemFileError, match=f"particles.file: .* is {kind}, not a regular file"):
            load_system(_system_in(inner, written), allow_outside_files=True)
    with pytest.raises(SystemFileError, match="system file: .* is a character device"):
        load_system("/dev/zero")
    with pytest.raises(SystemFileError, match="system file: .* is a folder"):
        load_system(tmp_path)


def test_size_caps_name_the_file_and_the_cap(tmp_path, monkeypatch):
    assert systemfile_reader.MAX_DATA_FILE_BYTES == systemfile_reader.MAX_SYSTEM_FILE_BYTES == 64 * 2**20
    inner = tmp_path / "inner"
    inner.mkdir()
    big = inner / "big.xyz"
    big.write_text(GOOD_XYZ + "\n" * 2000)
    system = _system_in(inner, "big.xyz")
    monkeypatch.setattr(systemfile_reader, "MAX_DATA_FILE_BYTES", 1000)
    with pytest.raises(SystemFileError, match=r"particles.file: .*big\.xyz has \d+ bytes, more than the 1000 bytes "
                                              "limit"):
        load_system(system)
    monkeypatch.setattr(systemfile_reader, "MAX_SYSTEM_FILE_BYTES", 100)
    with pytest.raises(SystemFileError, match=r"system file: .*system\.toml has \d+ bytes, more than the 100 bytes"):
        load_system(system)


@pytest.mark.parametrize("content, problem", [
    (f"{MARKER} root\n\n", "line 1: expected the particle count"),
    (f"2\n{MARKER}\nLJ 1 1 1\n{MARKER} 2 1\n", "line 4: 3 fields"),
    (f"2\nc\nLJ 1 1 1\nLJ {MARKER} 1 1\n", "line 4: x, y, z are not all numbers"),
    ("2\nc\nLJ 1 1 1\nLJ 2.2 1 nan\n", "line 4: a coordinate is NaN or infinite"),
    (f"2\nc\nLJ 1 1 1\n{MARKER}:x 2.2 1 1\n", "line 4: the type name is not a short plain word"),
    (f"3\n{MARKER}\nLJ 1 1 1\nLJ 2.2 1 1\n", "the count line says 3 particles, but 2 lines follow"),
    (f"2\nc\nLJ 1 1 1\nLJ 2.2 1 1\n{MARKER} 9 9 9\n", "non-blank lines after the 2 particle lines"),
    (b"2\nc\nLJ 1 1 1\n\xff\xfe " + MARKER.encode() + b"\n", "not UTF-8 text"),
])
def test_xyz_errors_give_line_and_reason_never_the_line(tmp_path, content, problem):
    inner = tmp_path / "inner"
    inner.mkdir()
    target = inner / "start.xyz"
    target.write_bytes(content if isinstance(content, bytes) else content.encode())
    with pytest.raises(SystemFileError, match="particles.file: ") as info:
        load_system(_system_in(inner, "start.xyz"))
    assert problem in str(info.value) and MARKER not in str(info.value)


@pytest.mark.parametrize("text, reason", [
    (f"{MARKER} = 1\n{MARKER} = 2\n", "a value is set twice"),
    (f"units = {MARKER}\n", "not valid TOML (text needs quotes)"),
    (f"[{MARKER}\n", "header not closed"),
    (f'units = "{MARKER}\n', "illegal character in a string"),
    (f"kT = [1, 2\n{MARKER} = 3\n", "not closed"),
    (f'"{MARKER}\x01" = 1\n', "illegal character"),
    (f"a = {{ {MARKER} = 1, {MARKER} = 2 }}\n", "repeated in an inline table"),
])
def test_toml_errors_give_position_and_reason_only(tmp_path, text, reason):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(SystemFileError, match=r"bad\.toml: not valid TOML: ") as info:
        load_system(path)
    message = str(info.value)
    assert reason in message and "(at line " in message and MARKER not in message, message


def test_paths_in_settings_are_resolved_in_the_system_folder(tmp_path):
    inner = tmp_path / "inner"
    inner.mkdir()
    (tmp_path / "elsewhere.ctl").write_bytes(b"x")
    (inner / "mine.ctl").write_bytes(b"x")
    with pytest.raises(SystemFileError, match="settings.control: .*lies outside the folder"):
        parse_system(edited(FIELD, ("settings",), {"control": "../elsewhere.ctl"}), source=str(inner / "s.toml"))
    with pytest.raises(SystemFileError, match="settings.save_control: .*lies outside the folder"):
        parse_system(edited(FIELD, ("settings",), {"save_control": "/tmp/out.ctl"}), source=str(inner / "s.toml"))
    with pytest.raises(SystemFileError, match="settings.control: .* is a character device"):
        parse_system(edited(FIELD, ("settings",), {"control": "/dev/zero"}), source=str(inner / "s.toml"),
                     allow_outside_files=True)
    system = parse_system(edited(FIELD, ("settings",), {"control": "mine.ctl", "save_control": "new.ctl"}),
                          source=str(inner / "s.toml"))
    assert system.settings["control"] == str((inner / "mine.ctl").resolve())
    assert system.settings["save_control"] == str((inner / "new.ctl").resolve())


# ------------------------------------------------------------------ 2. values of the wrong type

F, P = FIELD, PARTICLES
BAD_VALUES = [  # (layout, keys, value, key named in the message)
    (F, ("kT",), "1.25", "top level.kT"),
    (F, ("end_a", "stiffness"), ["1.75"], "end_a.stiffness"),
    (F, ("end_a", "start"), [True], "end_a.start"),
    (F, ("end_b", "centre"), "1.5", "end_b.centre"),
    (F, ("end_a", "field"), [MARKER], "end_a.field"),
    (F, ("units",), [MARKER], "units"),
    (F, ("name",), [MARKER], "name"),
    (F, ("description",), 5, "description"),
    (F, ("settings",), {"budget": "123456"}, "settings.budget"),
    (F, ("settings",), {"budget": True}, "settings.budget"),
    (F, ("settings",), {"budget": 1.5e5 + 0.5}, "settings.budget"),
    (F, ("settings",), {"seed": "37"}, "settings.seed"),
    (F, ("settings",), {"seed": -1}, "settings.seed"),
    (F, ("settings",), {"switching_steps": 12.5}, "settings.switching_steps"),
    (F, ("settings",), {"trajectories": "64"}, "settings.trajectories"),
    (F, ("settings",), {"chains": [8]}, "settings.chains"),
    (F, ("settings",), {"step_scale": "0.25"}, "settings.step_scale"),
    (F, ("settings",), {"step_scale": -0.5}, "settings.step_scale"),
    (F, ("settings",), {"method": 3}, "settings.method"),
    (F, ("settings",), {"schedule": {"kind": MARKER}}, "settings.schedule"),
    (F, ("settings",), {"schedule": [0.0, MARKER, 1.0]}, "settings.schedule"),
    (F, ("settings",), {"control": 1}, "settings.control"),
    (F, ("settings",), {"precondition": "yes"}, "settings.precondition"),
    (F, ("settings",), {"exchange": 1}, "settings.exchange"),
    (F, ("settings",), {"exchange_every": "10"}, "settings.exchange_every"),
    (F, ("settings",), {"samples_per_window": 8}, "settings.samples_per_window"),
    (F, ("settings",), {"window_starts": 1}, "settings.window_starts"),
    (F, ("settings",), {"starts_b": [["0.5"]]}, "settings.starts_b"),
    (F, ("settings",), {"control_settings": {"learning_rate": "0.01"}}, "settings.control_settings.learning_rate"),
    (F, ("settings",), {"control_settings": {"learn_schedule": MARKER}}, "settings.control_settings.learn_schedule"),
    (F, ("settings",), {"control_settings": {"patience": 2.5}}, "settings.control_settings.patience"),
    (F, ("settings",), {"control_settings": {"network": {"kind": "mlp", "width": "32"}}},
     "settings.control_settings.network.width"),
    (F, ("settings",), {"control_settings": {"network": {"kind": MARKER}}}, "settings.control_settings.network.kind"),
    (F, ("settings",), {"path": MARKER}, "settings.path"),
    (F, ("reference",), {"delta_f": 1.0, "tolerance": 0.0}, "reference.tolerance"),
    (F, ("reference",), {"delta_f": 1.0, "tolerance": -0.1}, "reference.tolerance"),
    (F, ("reference",), {"delta_f": 1.0, "tolerance": float("nan")}, "reference.tolerance"),
    (F, ("reference",), {"delta_f": float("inf")}, "reference.delta_f"),
    (F, ("reference",), {"delta_f": "1.04"}, "reference.delta_f"),
    (F, ("reference",), {"delta_f": 1.0, "source": [MARKER]}, "reference.source"),
    (P, ("kT",), "2.0", "top level.kT"),
    (P, ("units",), [MARKER], "units"),
    (P, ("particles", "positions"), [["1.0", 1.0, 1.0], [2.2, 1.0, 1.0]], "particles.positions"),
    (P, ("particles", "types"), ["LJ", 3], "particles.types"),
    (P, ("particles", "starts"), [[["1.0", 1.0, 1.0], [2.2, 1.0, 1.0]]], "particles.starts"),
    (P, ("box", "edges"), ["6.0", 6.0, 6.0], "box.edges"),
    (P, ("types", "LJ", "sigma"), "1.0", "types.LJ.sigma"),
    (P, ("types", "LJ", "epsilon"), True, "types.LJ.epsilon"),
    (P, ("types", "LJ", "charge"), "0", "types.LJ.charge"),
    (P, ("nonbonded", "cutoff"), "2.5", "nonbonded.cutoff"),
    (P, ("nonbonded", "shift"), MARKER, "nonbonded.shift"),
    (P, ("nonbonded", "exclude_bonded"), 1.0, "nonbonded.exclude_bonded"),
    (P, ("nonbonded", "mixing"), [MARKER], "nonbonded.mixing"),
    (P, ("nonbonded", "neighbour_capacity"), "100", "nonbonded.neighbour_capacity"),
    (P, ("topology", "bonds", 0, "length"), ["1.2"], "topology.bonds[0].length"),
    (P, ("topology", "bonds", 0, "atoms"), [[0, True]], "topology.bonds[0].atoms"),
    (P, ("restraints",), [{"form": "position", "atoms": [0], "force_constant": 1.0,
                          "reference": [["1", "1", "1"]]}], "restraints[0].reference"),
    (P, ("change", "decouple"), ["0"], "change.decouple"),
    (P, ("change", "electrostatics_share"), "0.5", "change.electrostatics_share"),
    (P, ("change", "stage_shape"), 1, "change.stage_shape"),
    (P, ("change", "parameters"), [{"group": [MARKER], "length": 1.1}], "change.parameters[0].group"),
    (P, ("settings",), {"budget": 1.5}, "settings.budget"),
    (P, ("settings",), {"seed": "3"}, "settings.seed"),
    (P, ("reference",), {"delta_f": float("nan")}, "reference.delta_f"),
]


@pytest.mark.parametrize("layout, keys, value, key", BAD_VALUES,
                         ids=[f"{'field' if c[0] is F else 'particles'}-{c[3]}-{i}" for i, c in enumerate(BAD_VALUES)])
def test_values_of_the_wrong_type_are_refused_naming_the_key(layout, keys, value, key):
    message = _refused(edited(layout, keys, value), key)
    for text in _strings_in(value):  # what the file wrote is never repeated
        assert repr(text) not in message and (len(text) < 3 or text not in message), message


def test_whole_number_floats_are_taken_as_integers(tmp_path):
    for budget in (1e5, 100000.0):
        system = parse_system(edited(FIELD, ("settings",), {"budget": budget, "seed": 3.0}))
        assert system.settings["budget"] == 100000 and type(system.settings["budget"]) is int
        assert system.settings["seed"] == 3 and type(system.settings["seed"]) is int
    path = tmp_path / "s.toml"
    path.write_text('kT = 1.0\nstart = 0\n[end_a]\nfield = "harmonic"\nstiffness = [1.0]\nstart = [0.0]\n'
                    '[end_b]\nfield = "harmonic"\nstiffness = [2.0]\nstart = [0.0]\n[settings]\nbudget = 1e5\n'
                    .replace("start = 0\n", ""))
    assert load_system(path).settings == {"budget": 100000}
    path.write_text(path.read_text().replace("budget = 1e5", "budget = 1.5e5"))
    assert load_system(path).settings == {"budget": 150000}
    path.write_text(path.read_text().replace("budget = 1.5e5", "budget = 100000.5"))
    with pytest.raises(SystemFileError, match="settings.budget: expected a whole number"):
        load_system(path)


def test_particle_layout_used_by_the_fuzz_is_valid():
    system = parse_system(copy.deepcopy(PARTICLES))
    assert system.start_a.shape == (2, 3) and system.particles["decoupled"] == [0]


# ------------------------------------------------------------------ 3. saved control files

def _two_wells(stiffness_b: float = 4.0):
    return LinearPath(lambda x: 0.5 * jnp.sum(x**2), lambda x: 0.5 * stiffness_b * jnp.sum((x - 1.0) ** 2))


@pytest.fixture(scope="module")
def saved(tmp_path_factory):
    """A tiny MLP control (2-D configurations) saved with a 4-step protocol; the file's bytes."""
    folder = tmp_path_factory.mktemp("controls")
    control = MLPControl((2,), ControlScales.neutral(2), width=4, depth=1, key=jax.random.key(3))
    probe = np.array([0.1, -0.2])
    file = folder / "good.ctl"
    save_control(file, control, lams=np.array([0.0, 0.2, 0.5, 0.8, 1.0]), step_sizes=np.full(4, 0.1),
                 fingerprint=system_fingerprint(_two_wells(), probe), settings={"system": "two wells"}, probe=probe)
    return folder, file, control, probe


def _split(raw: bytes) -> tuple[bytes, dict, bytes]:
    magic, header, weights = raw.split(b"\n", 2)
    return magic + b"\n", json.loads(header), weights


def _with_header(raw: bytes, **changes) -> bytes:
    magic, header, weights = _split(raw)
    header.update(changes)
    return magic + json.dumps(header).encode() + b"\n" + weights


def test_a_good_control_file_loads_and_fits_its_system(saved):
    folder, file, control, probe = saved
    loaded = load_control(file, path=_two_wells())
    np.testing.assert_array_equal(loaded.lams, [0.0, 0.2, 0.5, 0.8, 1.0])
    x = jnp.array([0.3, 0.7])
    np.testing.assert_array_equal(np.asarray(loaded.control(x, 0.4)), np.asarray(control(x, 0.4)))
    info = read_control_header(file)
    assert info["kind"] == "mlp" and info["shape"] == (2,) and info["fingerprint"] == loaded.fingerprint
    assert check_control_fits(file, _two_wells(), probe)["fingerprint"] == loaded.fingerprint


def test_a_control_for_another_system_is_refused_from_the_header(saved):
    folder, file, _, probe = saved
    with pytest.raises(ControlFileError, match="trained for system fingerprint .*two wells.*Train a new control"):
        check_control_fits(file, _two_wells(stiffness_b=5.0), probe)
    with pytest.raises(ControlFileError, match=r"configurations of shape \(2,\), but this system's configurations "
                                               r"have shape \(3,\)"):
        check_control_fits(file, _two_wells(), np.zeros(3))
    with pytest.raises(ControlFileError, match="trained for system fingerprint"):
        load_control(file, expected_fingerprint=system_fingerprint(_two_wells(stiffness_b=5.0), probe))
    # the header check reads no weights: a file whose weights are cut off still passes it
    cut = folder / "cut_weights.ctl"
    cut.write_bytes(file.read_bytes()[:-40])
    assert check_control_fits(cut, _two_wells(), probe)["kind"] == "mlp"


def _damaged_files(folder, file, control):
    raw = file.read_bytes()
    magic, header, weights = _split(raw)
    head_len = len(raw) - len(weights)
    nan_control = eqx.tree_at(lambda c: c.mlp.layers[0].bias, control, control.mlp.layers[0].bias.at[1].set(jnp.nan))
    save_control(folder / "nan.ctl", nan_control, lams=np.array(header["lams"]), step_sizes=np.array(header["step_sizes"]),
                 fingerprint=header["fingerprint"], probe=header["probe"])
    hyper = dict(header["hyperparameters"], shape=[3])
    (folder / "folder.ctl").mkdir(exist_ok=True)
    return [  # (name, bytes or a path, words the message must contain)
        ("empty", b"", "it is empty"),
        ("not a control file", f"{MARKER} secret\n".encode(), "does not start with the line FE_TOOL_CONTROL"),
        ("cut in the magic line", raw[:7], "does not start with the line"),
        ("cut in the header", raw[:len(magic) + 30], "ends inside the header line (truncated)"),
        ("header not JSON", magic + f"{{{MARKER}\n".encode() + weights, "not valid JSON"),
        ("header a JSON list", magic + f'["{MARKER}"]\n'.encode() + weights, "not a JSON object"),
        ("cut 1 byte into the weights", raw[:head_len + 1], "the file is truncated"),
        ("cut half-way through the weights", raw[:head_len + len(weights) // 2], "the file is truncated"),
        ("last byte missing", raw[:-1], "the file is truncated"),
        ("trailing garbage", raw + f"{MARKER}".encode(), "has trailing bytes"),
        ("NaN weight", (folder / "nan.ctl").read_bytes(), "1 weight(s) are NaN or infinite"),
        ("non-monotone schedule", _with_header(raw, lams=[0.0, 0.5, 0.2, 0.8, 1.0]), "rise strictly from 0 to 1"),
        ("schedule not ending at 1", _with_header(raw, lams=[0.0, 0.2, 0.5, 0.8, 0.9]), "rise strictly from 0 to 1"),
        ("NaN in the schedule", _with_header(raw, lams=[0.0, 0.2, float("nan"), 0.8, 1.0]).replace(b"NaN", b"NaN"),
         "not a flat list of finite numbers"),
        ("negative step size", _with_header(raw, step_sizes=[0.1, -0.1, 0.1, 0.1]), "step sizes must all be positive"),
        ("step sizes of the wrong count", _with_header(raw, step_sizes=[0.1, 0.1]), "needs 4 step sizes (one per λ step), the header has 2"),
        ("schedule without step sizes", _with_header(raw, step_sizes=None), "lams without step_sizes"),
        ("wrong configuration shape", _with_header(raw, hyperparameters=hyper, probe=None), "the file is truncated"),
        ("probe of another shape", _with_header(raw, probe=[0.0, 0.0, 0.0]), "probe configuration has shape (3,)"),
        ("format as text", _with_header(raw, format_version="1"), "an unreadable format number"),
        ("no fingerprint", _with_header(raw, fingerprint=None), "no readable system fingerprint"),
        ("unknown kind", _with_header(raw, kind=f"{MARKER}: x"), "a control of an unreadable kind"),
        ("settings not an object", _with_header(raw, settings=[MARKER]), "settings are not a JSON object"),
        ("a folder", folder / "folder.ctl", "is a folder, not a regular file"),
        ("/dev/zero", "/dev/zero", "is a character device, not a regular file"),
    ]


def test_damaged_control_files_are_refused_at_load(saved):
    """Each damaged file raises a ControlFileError naming the file and the problem, never its contents."""
    folder, file, control, _ = saved
    table = []
    for i, (name, content, words) in enumerate(_damaged_files(folder, file, control)):
        target = content
        if isinstance(content, bytes):
            target = folder / f"damaged_{i}.ctl"
            target.write_bytes(content)
        with pytest.raises(ControlFileError) as info:
            load_control(target, expected_fingerprint=None)
        message = str(info.value)
        table.append((name, message))
        assert str(target) in message and words in message and MARKER not in message, (name, message)
    assert len(table) >= 8


def test_control_files_over_the_size_cap_are_refused(saved, monkeypatch):
    assert storage.MAX_CONTROL_FILE_BYTES == 256 * 2**20
    _, file, _, _ = saved
    monkeypatch.setattr(storage, "MAX_CONTROL_FILE_BYTES", 200)
    with pytest.raises(ControlFileError, match=r"control file: .*good\.ctl has \d+ bytes, more than the 200 bytes"):
        load_control(file)
    with pytest.raises(ControlFileError, match="more than the 200 bytes"):
        read_control_header(file)


def test_save_writes_aside_and_never_onto_a_device(saved, tmp_path):
    _, file, control, probe = saved
    with pytest.raises(ControlFileError, match="exists and is not a regular file"):
        save_control(tmp_path, control, fingerprint="f")
    target = tmp_path / "c.ctl"
    save_control(target, control, fingerprint="f")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["c.ctl"]  # no partial file left behind
    assert load_control(target, expected_fingerprint="f").lams is None
