"""The evaluation budget of a switching run, split into stages before any of them runs.

One *evaluation* is one energy-and-gradient call of one end state at one configuration
(see :mod:`fe_tool.path`). A switching estimate spends its budget in four stages:

1. end-state sampling: at most ``sampling_share`` of the budget for each end (the sampler stops
   early once equilibrated and gives the rest back);
2. pilot switching: short uncontrolled runs that measure the λ profile and the dissipation
   against the step size (at most ``pilot_share`` of the budget);
3. control training (``control="auto"`` or ``"learned"``): paid from what is left, never so
   much that fewer than :data:`MIN_TRAJECTORIES` production trajectories would remain;
4. production switching in both directions: everything that is left.

:func:`plan_switching_budget` sizes the chains and the pilot so that the smallest version of
every stage fits, and refuses a budget that cannot give :data:`MIN_TRAJECTORIES` trajectories
per direction, naming the options that help. Each stage is then capped by what the plan gives
it, so the whole run never spends more than the budget.
"""
from __future__ import annotations

import dataclasses
import math

from ..switching import padded_trajectories

MIN_TRAJECTORIES = 20          # per direction; fewer make BAR's error bar itself unreliable (common practice)
SAMPLING_SHARE = 0.3           # of the budget, at most, for each end state
PILOT_SHARE = 0.15             # of the budget, at most, for all pilot switching
PILOT_STEPS = 32
PILOT_TRAJECTORIES = (16, 64)  # fewest and most pilot trajectories per direction and run
PILOT_SCALES = (1.0, 0.4, 0.16, 0.064)
SCHEDULE_PILOT_RUNS = 2        # the λ-profile pilot tries at most this many step scales
MIN_CHAIN_STEPS = 400          # sampler steps per chain that warm-up, burn-in and one sample need
STEPS_PER_CHAIN = 1000         # default chains: the sampling share buys about this many steps each
CHAINS = (16, 64)              # fewest and most chains chosen automatically
MIN_PRODUCTION_STEPS = 16      # switching steps assumed when the planner has not chosen K yet


@dataclasses.dataclass(frozen=True)
class SwitchingBudget:
    """How a switching run's budget is split (all counts in evaluations).

    Attributes:
        total: the budget (``None``: no limit, a fixed protocol).
        chains: sampling chains per end state.
        sampling_cap: most evaluations each end state's sampler may spend.
        pilot_trajectories: trajectories per direction in each pilot run (0: no pilot).
        pilot_scales: step scales of the step-size pilot (empty: none).
        schedule_pilot: whether the λ-profile pilot runs.
        pilot_cap: most evaluations all pilots together may spend.
        minimum_switching: evaluations :data:`MIN_TRAJECTORIES` trajectories per direction need.
    """

    total: int | None
    chains: int
    sampling_cap: int
    pilot_trajectories: int
    pilot_scales: tuple[float, ...]
    schedule_pilot: bool
    pilot_cap: int
    minimum_switching: int

    def pilot_run_cost(self, per_point: int) -> int:
        """Evaluations of one pilot run (both directions)."""
        return 2 * self.pilot_trajectories * (PILOT_STEPS + 1) * per_point


def switching_cost(trajectories: int, steps: int, per_point: float) -> int:
    """Evaluations of ``trajectories`` trajectories of ``steps`` steps in one direction (``per_point``
    may be fractional: a kinetic step adds a cheap energy at a second λ; the total is rounded up)."""
    return int(math.ceil(int(trajectories) * (int(steps) + 1) * float(per_point) - 1e-9))


def _pilot_runs(step_pilot: bool, schedule_pilot: bool, scales: tuple[float, ...]) -> int:
    return (len(scales) if step_pilot else 0) + (SCHEDULE_PILOT_RUNS if schedule_pilot else 0)


def _too_small(budget: int, needed: int, parts: str) -> ValueError:
    return ValueError(
        f"budget={budget:,} evaluations is too small for a switching estimate: {parts} need about {needed:,}. "
        f"Raise the budget (CLI --budget, API budget=) to at least {needed:,}; or use fewer sampling chains "
        "(chains=, at least 4); or fix the protocol with switching_steps= and step_scale= (skips the pilot); "
        "or try the windows route (method='windows', CLI --method windows).")


def plan_switching_budget(budget: int | None, *, per_point: int, end_evaluations: int, chains: int | None = None,
                          switching_steps: int | None = None, trajectories: int | None = None,
                          step_scale: float | None = None, adaptive_schedule: bool = True) -> SwitchingBudget:
    """Split ``budget`` into the stages of a switching run, or refuse it up front.

    Args:
        budget: total evaluations, or ``None`` for a fixed protocol without a limit.
        per_point: evaluations per trajectory point (``path.evaluations_per_point(1)``).
        end_evaluations: evaluations per sampler step of one end state.
        chains, switching_steps, trajectories, step_scale: the user's fixed choices, if any.
        adaptive_schedule: whether the λ-profile pilot runs.

    Raises:
        ValueError: the budget cannot pay for the smallest version of every stage with
            :data:`MIN_TRAJECTORIES` (or the asked ``trajectories``) per direction.
    """
    step_pilot = step_scale is None or switching_steps is None
    scales = (PILOT_SCALES if step_scale is None else (step_scale,)) if step_pilot else ()
    schedule_pilot = bool(adaptive_schedule)
    runs = _pilot_runs(step_pilot, schedule_pilot, scales)
    wanted = trajectories if trajectories is not None else MIN_TRAJECTORIES
    k_min = switching_steps if switching_steps is not None else MIN_PRODUCTION_STEPS
    minimum_switching = 2 * switching_cost(wanted, k_min, per_point)
    if budget is None:
        n_chains = chains or CHAINS[1]
        sampling_cap = 20 * n_chains * MIN_CHAIN_STEPS * end_evaluations  # no limit: generous
        lo = PILOT_TRAJECTORIES[1]
        return SwitchingBudget(None, n_chains, sampling_cap, lo if runs else 0, scales, schedule_pilot,
                               runs * 2 * lo * (PILOT_STEPS + 1) * per_point, minimum_switching)
    sampling_cap = int(SAMPLING_SHARE * budget)
    n_chains = chains or int(min(CHAINS[1], max(CHAINS[0], sampling_cap // (STEPS_PER_CHAIN * end_evaluations))))
    per_run = 2 * (PILOT_STEPS + 1) * per_point
    pilot_n = int(min(PILOT_TRAJECTORIES[1], max(PILOT_TRAJECTORIES[0], PILOT_SHARE * budget // max(runs * per_run, 1))))
    pilot_n = pilot_n if runs else 0
    pilot_cap = runs * pilot_n * per_run
    sampling_min = n_chains * MIN_CHAIN_STEPS * end_evaluations
    needed = 2 * sampling_min + pilot_cap + minimum_switching
    if budget < needed or sampling_cap < sampling_min:
        parts = (f"end-state sampling ({n_chains} chains × {MIN_CHAIN_STEPS} steps per end, {2 * sampling_min:,}), "
                 f"pilot switching ({pilot_cap:,}) and {wanted} trajectories per direction of {k_min} steps "
                 f"({minimum_switching:,})")
        raise _too_small(budget, max(needed, int(sampling_min / SAMPLING_SHARE) + 1), parts)
    return SwitchingBudget(int(budget), n_chains, sampling_cap, pilot_n, scales, schedule_pilot, pilot_cap,
                           minimum_switching)


def affordable_trajectories(evaluations: int, steps: int, per_point: int, batch: int, available: int) -> int:
    """Most trajectories per direction (≤ ``available``) whose padded cost in both directions fits."""
    count = int(min(available, evaluations // (2 * (steps + 1) * per_point)))
    while count > 0 and 2 * switching_cost(padded_trajectories(count, batch)[1], steps, per_point) > evaluations:
        count -= 1
    return max(count, 0)
