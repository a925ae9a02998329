"""The ways to ΔF. Each route has the same stages over one options object
(:class:`fe_tool.options.Options`, validated once by :func:`fe_tool.workflow.validate_call`):

* plan — split the budget and refuse what cannot work, before any computation;
* run — sample, pilot, switch (or sample every window);
* estimate — the estimators and their diagnostics;
* report — one :class:`~fe_tool.results.Result`.

Modules: :mod:`.switching` (nonequilibrium switching both ways), :mod:`.windows`
(equilibrium λ-windows with MBAR, BAR and TI), :mod:`.budget` and :mod:`.planning` (how a
switching budget and protocol are chosen), :mod:`.comparison` (routes at equal budget).
"""
