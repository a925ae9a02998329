"""Learned controls for nonequilibrium switching (controlled Monte Carlo diffusions).

A control is a learned drift added to annealed Langevin switching; with the kernel
pair of :mod:`fe_tool.switching` the forward work stays the exact log path-ratio,
so BAR/Jarzynski/Crooks stay unbiased whatever the control, and training lowers
the dissipation.  Public entry points:

* :func:`prepare_control` — train (``"learned"``), decide (``"auto"``) or reuse a
  control and a λ schedule within an evaluation budget → :class:`ControlOutcome`;
* :func:`save_control` / :func:`load_control` — files with a JSON header, no pickle, validated on
  load (:class:`ControlFileError`); :func:`check_control_fits` checks only the header against a system;
* :class:`Control`, :class:`MLPControl`, :func:`register_control` — the networks;
* :class:`Protocol`, :class:`ProtocolDrift`, :func:`bind_control` — learnable schedules
  and the drift of a control on a protocol;
* :func:`path_kl_loss`, :func:`jeffreys_loss`, :func:`log_variance_loss`,
  :func:`score_path`, :func:`record_paths` — objectives and path scoring.

Reference: Vargas, Padhy, Blessing & Nüsken 2024, "Transport meets variational
inference: controlled Monte Carlo diffusions", ICLR.
"""
from .networks import CONTROL_KINDS, Control, ControlScales, MLPControl, build_control, lambda_embedding, register_control
from .pair_force import PairForceControl, pair_force_settings
from .objectives import (OBJECTIVES, Controller, TrainData, TrainSetup, jeffreys_loss, log_variance_loss, path_kl_loss,
                         record_paths, score_path)
from .prepare import ControlOutcome, prepare_control
from .protocol import Protocol, ProtocolDrift, bind_control, level_rates, resample_schedule, resample_step_sizes
from .storage import (ControlFileError, LoadedControl, check_control_fits, load_control, read_control_header,
                      save_control, system_fingerprint)
from .training import TrainingReport, evaluate, make_optimiser, run_training, train_step, work_summary

__all__ = [
    "CONTROL_KINDS", "Control", "ControlFileError", "ControlOutcome", "ControlScales", "Controller", "LoadedControl",
    "MLPControl", "OBJECTIVES", "PairForceControl", "Protocol", "ProtocolDrift", "TrainData", "TrainSetup",
    "TrainingReport", "bind_control", "build_control", "check_control_fits", "evaluate", "jeffreys_loss",
    "lambda_embedding", "level_rates", "load_control", "log_variance_loss", "make_optimiser", "pair_force_settings",
    "path_kl_loss", "prepare_control", "read_control_header", "record_paths", "register_control", "resample_schedule",
    "resample_step_sizes", "run_training", "save_control", "score_path", "system_fingerprint", "train_step",
    "work_summary",
]
