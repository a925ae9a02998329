"""Bad input of every kind is refused before any computation, with the tool's own message.

API: ``fe_tool.estimate`` raises :class:`fe_tool.options.InputError` (a ``ValueError``) naming
the problem, within seconds (no sampling). CLI: exit status 2 and one ``fe-tool: error:`` line,
never a traceback. System-file, control-file and batch-file cases live in
tests/test_file_checks.py and tests/test_batch.py.
"""
from __future__ import annotations

import time

import jax.numpy as jnp
import numpy as np
import pytest

import fe_tool
from fe_tool.cli import main
from fe_tool.options import InputError


def ua(x):
    return 0.5 * jnp.sum(x**2)


def ub(x):
    return 2.0 * jnp.sum((x - 1.0) ** 2)


def branching(x):            # a Python `if` on a traced value: cannot be compiled
    if x[0] > 0:
        return jnp.sum(x**2)
    return jnp.sum(x)


def vector_valued(x):
    return x**2


def numpy_inside(x):         # converts a traced array to numpy
    return float(np.sum(np.asarray(x) ** 2))


GOOD = dict(energy_a=ua, energy_b=ub, start_a=np.zeros(2), start_b=np.ones(2))

API_CASES = [
    ("0-D start", dict(start_a=0.0, start_b=1.0), {}, "at least one dimension"),
    ("text start", dict(start_a="abc"), {}, "start_a"),
    ("ragged start", dict(start_a=[[0.0, 1.0], [0.0]]), {}, "start_a"),
    ("NaN start", dict(start_a=np.array([np.nan, 0.0])), {}, "NaN"),
    ("shape mismatch", dict(start_b=np.ones(3)), {}, "shape"),
    ("energy not callable", dict(energy_a=3.0), {}, "callable"),
    ("branch on a traced value", dict(energy_a=branching), {}, "jnp.where"),
    ("vector energy", dict(energy_b=vector_valued), {}, "scalar"),
    ("numpy inside energy", dict(energy_a=numpy_inside), {}, "energy_a"),
    ("infinite energy at start", dict(energy_b=lambda x: jnp.sum(x) + jnp.inf), {}, "not finite"),
    ("kT as text", {}, {"kT": "1"}, "kT"),
    ("kT zero", {}, {"kT": 0.0}, "kT"),
    ("kT NaN", {}, {"kT": float("nan")}, "kT"),
    ("kT True", {}, {"kT": True}, "kT"),
    ("seed NaN", {}, {"seed": float("nan")}, "seed"),
    ("seed text", {}, {"seed": "abc"}, "seed"),
    ("seed negative", {}, {"seed": -1}, "seed"),
    ("budget True", {}, {"budget": True}, "budget"),
    ("budget fractional", {}, {"budget": 1.5e5 + 0.5}, "budget"),
    ("budget text", {}, {"budget": "100000"}, "budget"),
    ("budget too small", {}, {"budget": 3_000}, "too small"),
    ("unknown option", {}, {"budgett": 10}, "unknown option"),
    ("method", {}, {"method": "magic"}, "method"),
    ("schedule name", {}, {"schedule": "zigzag"}, "schedule"),
    ("schedule not monotone", {}, {"schedule": [0.0, 0.7, 0.3, 1.0], "switching_steps": 3}, "rising strictly"),
    ("schedule without steps", {}, {"schedule": [0.0, 0.5, 1.0]}, "switching_steps"),
    ("step_scale negative", {}, {"step_scale": -1.0}, "step_scale"),
    ("chains too few", {}, {"chains": 2}, "chains"),
    ("unknown sampler", {}, {"sampler": "leapfrog"}, "sampler"),
    ("exchange with an unadjusted sampler", {}, {"method": "windows", "exchange": True, "sampler": "kinetic"},
     "exchange"),
    ("trajectories one", {}, {"trajectories": 1}, "trajectories"),
    ("control unknown", {}, {"control": "sometimes"}, "control"),
    ("save_control folder missing", {}, {"save_control": "/no/such/folder/c.eqx"}, "does not exist"),
    ("reference without delta_f", {}, {"reference": {"source": "x"}}, "delta_f"),
    ("reference negative tolerance", {}, {"reference": {"delta_f": 1.0, "tolerance": -0.1}}, "tolerance"),
    ("windows with a switching option", {}, {"method": "windows", "switching_steps": 10}, "switching route"),
    ("progress as text", {}, {"progress": "yes"}, "progress"),
    ("start set of wrong shape", {}, {"starts_a": np.zeros((2, 3))}, "starts_a"),
    ("path of the wrong kind", {}, {"path": "linear"}, "path"),
]


@pytest.mark.parametrize("name, changes, options, words", API_CASES, ids=[c[0] for c in API_CASES])
def test_api_refuses_bad_input_before_computing(name, changes, options, words):
    call = {**GOOD, **changes}
    t0 = time.perf_counter()
    with pytest.raises(InputError) as err:
        fe_tool.estimate(call["energy_a"], call["energy_b"], call["start_a"], call["start_b"],
                         **{"progress": False, **options})
    assert words in str(err.value), str(err.value)
    assert time.perf_counter() - t0 < 20.0   # refused before sampling (compilation of the check only)


def test_a_saved_control_for_another_system_is_refused_before_sampling(tmp_path):
    from fe_tool.control import ControlScales, build_control, save_control
    from fe_tool.control.prepare import ControlOutcome  # noqa: F401  (the type a workflow would save)
    import jax

    other = fe_tool.LinearPath(ua, lambda x: 3.0 * jnp.sum(x**2), 1.0)
    scales = ControlScales.from_samples(np.zeros((4, 2)), np.ones((4, 2)), np.ones(2))
    control = build_control("mlp", (2,), scales, key=jax.random.key(0))
    file = tmp_path / "other.eqx"
    save_control(str(file), control, fingerprint=other.fingerprint_probe(np.zeros(2)))
    t0 = time.perf_counter()
    with pytest.raises(InputError, match="fingerprint|another system|different system"):
        fe_tool.estimate(ua, ub, np.zeros(2), np.ones(2), control=str(file), progress=False)
    assert time.perf_counter() - t0 < 20.0


CLI_CASES = [
    ["run", "no_such_system"],
    ["run", "harmonic3d"],
    ["run", "harmonic_3d", "--budget", "10"],
    ["run", "harmonic_3d", "--json", "/no/such/folder/out.json"],
    ["run", "harmonic_3d", "--save-control", "/no/such/folder/c.eqx"],
    ["run", "harmonic_3d", "--schedule", "zigzag"],
    ["run", "harmonic_3d", "--control", "no_such_control_file.eqx"],
    ["run", "harmonic_3d", "--method", "windows", "--steps", "10"],
    ["compare", "harmonic_3d", "--routes", "teleport"],
]


@pytest.mark.parametrize("argv", CLI_CASES, ids=[" ".join(a) for a in CLI_CASES])
def test_cli_refuses_bad_input_with_exit_status_2(argv, capsys):
    assert main(argv + (["--quiet"] if argv[0] == "run" else [])) == 2
    err = capsys.readouterr().err
    assert err.startswith("fe-tool: error:") and "Traceback" not in err


def test_cli_budget_accepts_scientific_notation():
    from fe_tool.cli import budget_number

    assert budget_number("1e5") == 100_000 and budget_number("1_000_000") == 1_000_000
    for bad in ("abc", "1.5", "0", "-5", "nan"):
        with pytest.raises(Exception):
            budget_number(bad)
