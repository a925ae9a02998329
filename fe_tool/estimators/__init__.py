"""Free-energy estimators: pure functions of reduced works or reduced energies (float64 numpy).

Every estimator returns an :class:`Estimate` (Δf = f_B − f_A in kT units with its error);
:func:`mbar` returns a :class:`MultistateEstimate` whose ``endpoint`` is one.
"""
from fe_tool.estimators.bar import bar, bar_variance, solve_bar, work_overlap
from fe_tool.estimators.crooks import crooks_gaussian, gaussian_crossing
from fe_tool.estimators.jarzynski import (
    as_generator,
    check_works,
    exponential_average,
    exponential_average_asymptotics,
    jarzynski,
)
from fe_tool.estimators.mbar import (
    MultistateEstimate,
    check_reduced_energies,
    mbar,
    mbar_expectations,
    mbar_weights,
)
from fe_tool.estimators.neighbours import neighbour_bar
from fe_tool.estimators.record import Estimate
from fe_tool.estimators.ti import gauss_legendre_windows, thermodynamic_integration, trapezoid_weights

__all__ = [
    "Estimate",
    "MultistateEstimate",
    "as_generator",
    "bar",
    "bar_variance",
    "check_reduced_energies",
    "check_works",
    "crooks_gaussian",
    "exponential_average",
    "exponential_average_asymptotics",
    "gauss_legendre_windows",
    "gaussian_crossing",
    "jarzynski",
    "mbar",
    "mbar_expectations",
    "mbar_weights",
    "neighbour_bar",
    "solve_bar",
    "thermodynamic_integration",
    "trapezoid_weights",
    "work_overlap",
]
