"""Energy terms, the periodic box, neighbour lists and model assembly.

Pure JAX functions of positions and parameters (:mod:`bonded`, :mod:`nonbonded`,
:mod:`restraints`, :mod:`fields`), fixed-shape pair lists (:mod:`neighbours`), and
:func:`assemble` to combine terms into one :class:`EnergyModel` with alchemical knobs
``lj_coupling`` and ``coulomb_scale``.
"""
from fe_tool.energy import box
from fe_tool.energy import bonded
from fe_tool.energy import nonbonded
from fe_tool.energy import neighbours
from fe_tool.energy import restraints
from fe_tool.energy import fields
from fe_tool.energy import model
from fe_tool.energy.box import *  # noqa: F401,F403  (the names in box.__all__)
from fe_tool.energy.bonded import *  # noqa: F401,F403  (the names in bonded.__all__)
from fe_tool.energy.nonbonded import *  # noqa: F401,F403  (the names in nonbonded.__all__)
from fe_tool.energy.neighbours import *  # noqa: F401,F403  (the names in neighbours.__all__)
from fe_tool.energy.restraints import *  # noqa: F401,F403  (the names in restraints.__all__)
from fe_tool.energy.fields import *  # noqa: F401,F403  (the names in fields.__all__)
from fe_tool.energy.model import *  # noqa: F401,F403  (the names in model.__all__)

# one list, owned by the submodules: each term module's __all__ says what it exports
__all__ = [name for module in (box, bonded, nonbonded, neighbours, restraints, fields, model) for name in module.__all__]
