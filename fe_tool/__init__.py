"""fe_tool: free-energy differences ΔF = F_B − F_A between two end-state potentials.

Importing fe_tool switches JAX to float64 (free energies are differences of large
numbers) and enables JAX's persistent compilation cache in a user cache folder
(set ``FE_TOOL_COMPILATION_CACHE=0`` to switch it off, or to a path to move it).
"""
from __future__ import annotations

import os

import jax

jax.config.update("jax_enable_x64", True)


def _enable_compilation_cache() -> None:
    setting = os.environ.get("FE_TOOL_COMPILATION_CACHE", "")
    if setting == "0":
        return
    if setting:
        folder = setting
    else:
        import platformdirs
        folder = os.path.join(platformdirs.user_cache_dir("fe_tool"), "jax-compilation")
    try:
        os.makedirs(folder, exist_ok=True)
        jax.config.update("jax_compilation_cache_dir", folder)
        jax.config.update("jax_persistent_cache_min_compile_time_secs", 0.2)
        jax.config.update("jax_persistent_cache_min_entry_size_bytes", 0)
    except OSError:  # read-only home: run without the cache
        pass


_enable_compilation_cache()

from .alchemy import ParameterInterpolationPath, SoftCoreDecouplingPath  # noqa: E402
from .path import LinearPath, Path, make_schedule  # noqa: E402
from .results import CAUTION, Result  # noqa: E402
from .systemfile import System, load_system  # noqa: E402
from .workflow import Options, estimate  # noqa: E402

__all__ = ["CAUTION", "LinearPath", "Options", "ParameterInterpolationPath", "Path", "Result",
           "SoftCoreDecouplingPath", "System", "estimate", "load_system", "make_schedule"]
__version__ = "0.1.0"
