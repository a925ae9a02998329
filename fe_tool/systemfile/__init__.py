"""System files: a TOML description of two end states, read and validated into energies.

The format — every table and key of both layouts, the energy of every term, the file-safety
rules and worked examples — is described for users in docs/system-files.md.

Modules: :mod:`.reader` (value checks, units, old key names, TOML and XYZ files), :mod:`.settings`
(``[reference]``, ``[settings]``), :mod:`.fields` (the field layout), :mod:`.particles` and
:mod:`.particle_terms` (the particle layout), :mod:`.system` (:class:`System`, the catalogue).
"""
from __future__ import annotations

import os
import pathlib

from .fields import parse_fields
from .particles import parse_particles
from .reader import (MAX_DATA_FILE_BYTES, MAX_SYSTEM_FILE_BYTES, SystemFileError, fail, read_toml, read_xyz,
                     toml_error_text)
from .system import System, bundled_systems_folder, find_system, first_sentence, list_systems


def parse_system(data: dict, source: str = "<dict>", *, allow_outside_files: bool = False) -> System:
    """Validate an already-parsed system description (docs/system-files.md).

    Args:
        data: the parsed TOML tables.
        source: the file it came from; relative data paths start in its folder (the
            current folder for ``"<dict>"``).
        allow_outside_files: accept data paths that lead outside that folder
            (see :func:`load_system`).
    """
    if not isinstance(data, dict):
        fail("top level", "a table of keys (a parsed system file)", data)
    if "particles" in data:
        return parse_particles(data, source, allow_outside_files)
    return parse_fields(data, source, allow_outside_files)


def load_system(path: str | os.PathLike, *, allow_outside_files: bool = False) -> System:
    """Read and validate a system file; raise :class:`SystemFileError` naming any bad key.

    Args:
        path: the system file (a regular file of at most ``reader.MAX_SYSTEM_FILE_BYTES``, UTF-8 TOML).
        allow_outside_files: let the file name data files (``[particles] file``, a saved
            ``[settings] control``, ``save_control``) outside its own folder. By default every
            such path is resolved (symlinks and ``..`` included) relative to the system file's
            folder and refused if it leads outside it, so a shared system file cannot make the
            tool read or write elsewhere.
    """
    path = pathlib.Path(path)
    return parse_system(read_toml(path), source=str(path), allow_outside_files=allow_outside_files)


__all__ = ["MAX_DATA_FILE_BYTES", "MAX_SYSTEM_FILE_BYTES", "System", "SystemFileError", "bundled_systems_folder",
           "find_system", "first_sentence", "list_systems", "load_system", "parse_system", "read_xyz",
           "toml_error_text"]
