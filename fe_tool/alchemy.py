"""Alchemical paths for particle systems: parameter interpolation and soft-core decoupling.

Both classes are :class:`~fe_tool.path.Path` subclasses, so :func:`fe_tool.estimate`
takes them through ``path=``; the switching work formula of :mod:`fe_tool.switching`
holds for any path, and each point costs one energy evaluation (whatever λ is).

Energies are reduced, u = U/kT. The terms are those of :mod:`fe_tool.energy.model`.

**Parameter interpolation** (:class:`ParameterInterpolationPath`, "this torsion's
parameters become …", "this restraint is released")::

    u(x, λ) = [ Σ_shared U_t(x) + Σ_changed U_t(x; θ_t(λ))
                + (1 − λ) Σ_{only in A} U_t(x) + λ Σ_{only in B} U_t(x) ] / kT,
    θ_t(λ) = (1 − λ) θ_t^A + λ θ_t^B    (every floating-point parameter of the term).

For terms linear in their parameters (Ryckaert–Bellemans coefficients, force constants)
this equals linear mixing of the two end energies, at half its cost; for others (phases,
equilibrium lengths) it is a genuinely different, still smooth, path.

**Soft-core decoupling** (:class:`SoftCoreDecouplingPath`): the alchemical particles of a
:class:`~fe_tool.energy.model.Nonbonded` term lose their nonbonded interactions with the
rest of the system in two stages (a common protocol; charges are never left on a particle
whose repulsive core has gone):

    λ ∈ [0, s]:   coulomb_scale = 1 − h(λ/s),             lj_coupling = 1
    λ ∈ [s, 1]:   coulomb_scale = 0,                      lj_coupling = 1 − h((λ − s)/(1 − s))

with the electrostatics share s (0 when the alchemical particles carry no charge, then the
whole of λ switches LJ) and the stage shape h(t) = 3t² − 2t³ (``stage_shape="smooth"``,
default) or h(t) = t (``"linear"``). The smooth shape has dh/dt = 0 at both ends of each
stage, so u and ∂u/∂λ are continuous at the joint λ = s (C¹; the linear shape is only C⁰).
LJ is switched through the soft core of Beutler, Mark, van Schaik, Gerber & van Gunsteren
1994 (Chem. Phys. Lett. 222, 529), ``U_sc = 4ελ[1/(α(1−λ)+(r/σ)⁶)² − 1/(α(1−λ)+(r/σ)⁶)]``,
which is finite at r = 0 for λ < 1: a decoupled particle can overlap others without an
infinite work increment when it is recoupled (no end-point singularity).

**Direction convention.** ΔF = F_B − F_A with A = λ = 0 = *coupled* (fully interacting) and
B = λ = 1 = *decoupled*. For one particle decoupled from a fluid, Z_B = V·Z_{N−1} and
Z_A = Z_N, so the excess chemical potential is **μ_ex = F_A − F_B = −ΔF**.

**Neighbours.** The path energy must be a pure function of positions (the samplers and
the switching kernel only pass positions). ``pair_search="all_pairs"`` uses the Nonbonded
term's all-pairs table: O(N²) per evaluation, exact, the right choice below ~1000
particles. ``"neighbour_list"`` rebuilds a fixed-capacity list *inside every energy call*
(skin 0, radius = cutoff): the build is itself O(N) with cells (N ≥ 512 and a box of ≥ 3
cells) or O(N²) otherwise, so it only pays for large N; if a configuration has more pairs
than the capacity the energy is NaN, which the workflow counts as a diverged trajectory.

**Cheap work, exact redraws.** ``path.energy_change(x, λ₁, λ₂)`` = u(x, λ₂) − u(x, λ₁) from the
group's switched pairs (O(k·n) for k group particles), the tail and the extra terms only.
``path.redraw_decoupled(key, x)`` moves the group rigidly to a uniformly random place and
orientation, an exact draw at λ = 1 when ``path.can_redraw_decoupled()``; with both, zero-step
switching from B is test-particle insertion: βμ_ex = −ln⟨exp(−energy_change(redrawn x, 1, 0))⟩_B.

Example:
    >>> path = SoftCoreDecouplingPath(model, kT=2.0)          # model: alchemical Nonbonded
    >>> r = fe_tool.estimate(path.end_function("a"), path.end_function("b"), x0, x0,
    ...                      kT=2.0, path=path)               # μ_ex = −r.delta_f
"""
from __future__ import annotations

from typing import Callable, Sequence

import equinox as eqx
import jax
import jax.numpy as jnp

from .energy import model as terms
from .energy.box import minimum_image, wrap_positions
from .energy.model import EnergyModel, Nonbonded, Term
from .energy.neighbours import NeighbourListBuilder, count_pairs_within, neighbour_list_builder
from .energy.nonbonded import nonbonded_energy_parts, subset_pairs
from .path import Path
from .types import Array, Configuration

STAGE_SHAPES = ("smooth", "linear")


def stage_shape(t: Array, shape: str = "smooth") -> Array:
    """h(t) on [0, 1]: ``"smooth"`` 3t² − 2t³ (C¹ joints) or ``"linear"`` t."""
    t = jnp.clip(t, 0.0, 1.0)
    if shape == "linear":
        return t
    return t * t * (3.0 - 2.0 * t)


def stage_couplings(lam: Array, electrostatics_share: float, shape: str = "smooth") -> tuple[Array, Array]:
    """``(coulomb_scale, lj_coupling)`` at λ for the two-stage decoupling (1 = coupled).

    Args:
        lam: λ ∈ [0, 1] (0 = coupled state A, 1 = decoupled state B).
        electrostatics_share: s ∈ [0, 1): the part of λ that switches charges off; 0 when
            there is nothing to switch (the Coulomb scale then follows the LJ coupling).
        shape: ``"smooth"`` or ``"linear"`` stage shape h.
    """
    s = float(electrostatics_share)
    if s <= 0.0:
        lj = 1.0 - stage_shape(lam, shape)
        return lj, lj
    coulomb = 1.0 - stage_shape(lam / s, shape)
    lj = 1.0 - stage_shape((lam - s) / (1.0 - s), shape)
    return coulomb, lj


def interpolate_term(term_a: Term, term_b: Term, lam: Array) -> Term:
    """The term with every floating-point parameter at (1 − λ) θ_A + λ θ_B (indices from A)."""
    def mix(a, b):
        if isinstance(a, jax.Array) and jnp.issubdtype(a.dtype, jnp.floating):
            return a + lam * (b - a)
        return a

    return jax.tree_util.tree_map(mix, term_a, term_b)


def _check_pairs(changed_a, changed_b):
    if len(changed_a) != len(changed_b):
        raise ValueError("changed_a and changed_b must list the same terms (one B version per A term).")
    for a, b in zip(changed_a, changed_b):
        if jax.tree_util.tree_structure(a) != jax.tree_util.tree_structure(b):
            raise ValueError(f"term {getattr(a, 'name', a)!r}: the A and B versions must have the same kind "
                             "and parameter shapes to be interpolated.")


class ParameterInterpolationPath(Path):
    """u(x, λ) with shared terms, interpolated parameters and terms present at one end only.

    Args:
        shared: terms identical in both states (a Nonbonded term here is always coupled).
        changed_a, changed_b: matching terms whose parameters change (same kind and shapes).
        only_a: terms present in A only ("released" in B), weighted by 1 − λ.
        only_b: terms present in B only, weighted by λ.
        box: periodic box edges or ``None``.
        kT: thermal energy in the terms' energy unit.
    """

    shared: tuple
    changed_a: tuple
    changed_b: tuple
    only_a: tuple
    only_b: tuple
    box: Array | None

    def __init__(self, shared: Sequence[Term] = (), changed_a: Sequence[Term] = (), changed_b: Sequence[Term] = (),
                 only_a: Sequence[Term] = (), only_b: Sequence[Term] = (), *, box=None, kT: float = 1.0):
        _check_pairs(tuple(changed_a), tuple(changed_b))
        self.shared, self.changed_a, self.changed_b = tuple(shared), tuple(changed_a), tuple(changed_b)
        self.only_a, self.only_b = tuple(only_a), tuple(only_b)
        self.box = None if box is None else jnp.asarray(box, dtype=jnp.result_type(float))
        self.kT = float(kT)

    def _terms_energy(self, x: Configuration, lam: Array, neighbours=None) -> Array:
        total = jnp.zeros((), dtype=jnp.result_type(float))
        for term in self.shared:  # a handful of terms, unrolled at trace time
            total = total + (term(x, box=self.box, neighbours=neighbours) if neighbours is not None
                             else term(x, box=self.box))
        return total + self._extra_energy(x, lam)

    def _extra_energy(self, x: Configuration, lam: Array) -> Array:
        """The interpolated extra terms (changed and one-ended) at one λ, energy units."""
        total = jnp.zeros((), dtype=jnp.result_type(float))
        for a, b in zip(self.changed_a, self.changed_b):  # a handful of terms, unrolled at trace time
            total = total + interpolate_term(a, b, lam)(x, box=self.box)
        for term in self.only_a:
            total = total + (1.0 - lam) * term(x, box=self.box)
        for term in self.only_b:
            total = total + lam * term(x, box=self.box)
        return total

    def energy(self, x: Configuration, lam: Array, neighbours=None) -> Array:
        return self._terms_energy(x, lam, neighbours) / self.kT

    def end_function(self, end: str) -> Callable:
        """``U(x)`` of end ``"a"`` or ``"b"`` in energy units (for ``estimate``'s checks)."""
        lam = 0.0 if end == "a" else 1.0
        return lambda x: self.energy(x, jnp.asarray(lam)) * self.kT

    def description(self) -> str:
        names = [getattr(t, "name", "?") for t in self.changed_a]
        parts = []
        if names:
            parts.append("parameters of " + ", ".join(names) + " interpolated")
        if self.only_a:
            parts.append("released: " + ", ".join(t.name for t in self.only_a))
        if self.only_b:
            parts.append("added: " + ", ".join(t.name for t in self.only_b))
        return "parameter interpolation (" + ("; ".join(parts) or "no change") + ")"


class SoftCoreDecouplingPath(ParameterInterpolationPath):
    """Two-stage soft-core decoupling of a Nonbonded term's alchemical particles (see module doc).

    Args:
        model: an :class:`~fe_tool.energy.model.EnergyModel` whose Nonbonded term has
            ``alchemical`` particles; its other terms are shared unless listed below.
        kT: thermal energy in the model's energy unit.
        electrostatics_share: s; ``None`` chooses 0.5 when an alchemical particle is charged
            and some other particle is charged too, else 0.
        stage_shape: ``"smooth"`` (C¹ at the joint) or ``"linear"``.
        changed_a, changed_b, only_a, only_b: extra parameter changes, interpolated over the
            whole λ ∈ [0, 1] (terms of ``model`` with these names are replaced).
        pair_search: ``"all_pairs"`` or ``"neighbour_list"`` (rebuilt in every call).
        neighbour_capacity: pair capacity for ``"neighbour_list"``; ``None`` sizes it from
            ``reference_positions`` (1.5 × the pairs found + 64).
        reference_positions: (n, d) positions used to size the neighbour list.
    """

    nonbonded: Nonbonded
    neighbour_builder: NeighbourListBuilder | None
    carried_builder: NeighbourListBuilder | None
    group: Array
    changing_pairs: Array
    electrostatics_share: float = eqx.field(static=True)
    stage_form: str = eqx.field(static=True)
    full_pair_count: int = eqx.field(static=True)
    redraw_obstacle: str = eqx.field(static=True)

    def __init__(self, model: EnergyModel, kT: float = 1.0, *, electrostatics_share: float | None = None,
                 stage_shape: str = "smooth", changed_a: Sequence[Term] = (), changed_b: Sequence[Term] = (),
                 only_a: Sequence[Term] = (), only_b: Sequence[Term] = (), pair_search: str = "all_pairs",
                 neighbour_capacity: int | None = None, reference_positions=None):
        term = model.nonbonded
        if term is None or term.alchemical is None:
            raise ValueError("SoftCoreDecouplingPath needs a model whose Nonbonded term has alchemical particles "
                             "(nonbonded_term(..., alchemical=[...])).")
        if stage_shape not in STAGE_SHAPES:
            raise ValueError(f"stage_shape must be one of {STAGE_SHAPES}, got {stage_shape!r}")
        if pair_search not in ("all_pairs", "neighbour_list"):
            raise ValueError(f"pair_search must be 'all_pairs' or 'neighbour_list', got {pair_search!r}")
        if electrostatics_share is None:
            electrostatics_share = 0.5 if _group_is_charged(term) else 0.0
        if not 0.0 <= electrostatics_share < 1.0:
            raise ValueError(f"electrostatics_share must be in [0, 1), got {electrostatics_share}")
        replaced = {t.name for t in (*changed_a, *only_a)}
        shared = [t for t in model.terms if not isinstance(t, Nonbonded) and t.name not in replaced]
        super().__init__(shared, changed_a, changed_b, only_a, only_b, box=model.box, kT=kT)
        self.nonbonded = term
        self.electrostatics_share = float(electrostatics_share)
        self.stage_form = stage_shape
        import numpy as np
        mask = np.asarray(term.alchemical)
        exclusions = np.asarray(term.exclusions)
        self.group = jnp.asarray(np.flatnonzero(mask), dtype=jnp.int32)
        self.changing_pairs = jnp.asarray(subset_pairs(mask, term.n_particles, exclusions,
                                                       include_internal=not term.decouple_internal))
        n = term.n_particles
        self.full_pair_count = max(n * (n - 1) // 2 - len(exclusions), 1)
        self.redraw_obstacle = _redraw_obstacle(term, self.box, self.shared, self.changed_a + self.changed_b
                                                + self.only_a + self.only_b)
        builder = None
        if pair_search == "neighbour_list":
            if term.cutoff is None or model.box is None:
                raise ValueError("pair_search='neighbour_list' needs a periodic box and a cutoff.")
            if neighbour_capacity is None:
                if reference_positions is None:
                    raise ValueError("give neighbour_capacity or reference_positions to size the neighbour list.")
                import numpy as np
                found = count_pairs_within(np.asarray(reference_positions), model.box, term.cutoff,
                                           np.asarray(term.exclusions))
                # a start (a lattice, a dilute gas) may have far fewer pairs than the fluid it melts into:
                # never size below the pairs of a uniform fluid at this density (plus 50 % for fluctuations)
                neighbour_capacity = int(1.5 * max(found, _uniform_pairs(term.n_particles, model.box, term.cutoff))) + 64
            builder = neighbour_list_builder(term.n_particles, model.box, term.cutoff, 0.0, int(neighbour_capacity),
                                             exclusions=term.exclusions, dimension=int(model.box.shape[0]))
        self.neighbour_builder = builder
        self.carried_builder = None if builder is None else _carried_builder(term, model.box, int(neighbour_capacity))

    def dynamics_neighbour_builder(self):
        """A list with a skin of about 0.12 cutoff (common practice), carried by samplers and
        rebuilt only when a particle has moved more than half the skin (Verlet 1967); ``None``
        when the path searches all pairs."""
        return self.carried_builder

    def couplings(self, lam: Array) -> tuple[Array, Array]:
        """``(coulomb_scale, lj_coupling)`` at λ."""
        return stage_couplings(lam, self.electrostatics_share, self.stage_form)

    def energy(self, x: Configuration, lam: Array, neighbours=None) -> Array:
        coulomb_scale, lj_coupling = self.couplings(lam)
        if neighbours is None and self.neighbour_builder is not None:
            # pair membership is a discrete choice: no gradient flows through the build
            neighbours = self.neighbour_builder.build(jax.lax.stop_gradient(x))
        nonbonded = self.nonbonded(x, box=self.box, neighbours=neighbours, lj_coupling=lj_coupling,
                                   coulomb_scale=coulomb_scale)
        return (self._terms_energy(x, lam) + nonbonded) / self.kT

    # ------------------------------------------------------------ the λ-dependent part alone

    def changing_energy(self, x: Configuration, lams: Array) -> Array:
        """The λ-dependent part of u(x, λ) (reduced) at λ = ``lams`` (a scalar or a vector (c,)).

        The group's switched pairs (:func:`~fe_tool.energy.nonbonded.subset_pairs`: group–rest,
        and group-internal when ``decouple_internal`` is off), the tail correction and the extra
        terms; u(x, λ) minus this is the same at every λ. The pairs are evaluated once for all
        λ values by :func:`~fe_tool.energy.nonbonded.nonbonded_energy_parts` itself.
        """
        lams = jnp.asarray(lams, dtype=jnp.result_type(float))
        coulomb_scale, lj_coupling = self.couplings(lams)
        parts = nonbonded_energy_parts(x, pairs=self.changing_pairs, box=self.box, lj_coupling=lj_coupling,
                                       coulomb_scale=coulomb_scale, **self.nonbonded.pair_settings())
        total = parts["lennard_jones"] + parts["coulomb"] + self.nonbonded.tail_energy(lj_coupling)
        if self.changed_a or self.only_a or self.only_b:
            extra = (jax.vmap(lambda lam: self._extra_energy(x, lam))(lams) if lams.ndim
                     else self._extra_energy(x, lams))
            total = total + extra
        return total / self.kT

    def energy_change(self, x: Configuration, lam_from: Array, lam_to: Array) -> Array:
        """u(x, λ_to) − u(x, λ_from) from the group's switched pairs, the tail and the extra terms only.

        O(k·n) pairs for k group particles among n (all pairs within the cutoff, minimum image);
        equal to the difference of two full :meth:`energy` calls up to rounding.
        """
        lams = jnp.stack([jnp.asarray(lam_from, dtype=jnp.result_type(float)),
                          jnp.asarray(lam_to, dtype=jnp.result_type(float))])
        both = self.changing_energy(x, lams)
        return both[1] - both[0]

    def energy_change_cost(self) -> float:
        """Cost of one :meth:`energy_change` in full evaluations: 2 m / M, at most 2.

        Convention: pair-energy evaluations are counted, m switched pairs at each of the two λ
        values, against M = n(n − 1)/2 − exclusions pairs of one full all-pairs evaluation (a
        neighbour-list evaluation touches fewer pairs, so the fraction is then an underestimate);
        the extra terms (small bonded terms) and the shared pair geometry are not counted.
        One decoupled particle in n: 4/n (0.037 at n = 108, 0.016 at n = 256).
        """
        return min(2.0, 2.0 * int(self.changing_pairs.shape[0]) / self.full_pair_count)

    def lambda_derivative(self, x: Configuration, lam: Array) -> Array:
        """∂u/∂λ at (x, λ) from the λ-dependent part alone (:meth:`changing_energy`)."""
        return jax.grad(lambda value: self.changing_energy(x, value))(jnp.asarray(lam, dtype=jnp.result_type(float)))

    # ------------------------------------------------------------ exact redraws at the decoupled end

    def can_redraw_decoupled(self) -> bool:
        """True when :meth:`redraw_decoupled` leaves π_B invariant (see :func:`_redraw_obstacle`)."""
        return not self.redraw_obstacle

    def redraw_decoupled(self, key, x: Configuration) -> Configuration:
        """x with the group moved to a uniformly random place and orientation (a draw given the rest in π_B).

        The group's geometry is unwrapped by the minimum image relative to its first particle
        (so it must span less than half the box, as its bonds already require), turned about
        its centre by a uniformly random rotation (3-D: from a normalised Gaussian quaternion;
        2-D: a uniform angle; none for one particle), and its centre placed uniformly in the
        box; the group is then wrapped into the box. At λ = 1 the group's internal energy is
        unchanged by a rigid motion and nothing else sees it, so this is an exact draw of the
        group's position and orientation given its shape and the rest: a move that keeps π_B.
        One configuration (vmap for many); jit-able. A carried neighbour list must be rebuilt.

        Raises:
            ValueError: when :meth:`can_redraw_decoupled` is False (the reason is named).
        """
        if self.redraw_obstacle:
            raise ValueError(f"the decoupled group cannot be redrawn exactly: {self.redraw_obstacle}.")
        dimension = x.shape[-1]
        key_place, key_turn = jax.random.split(key)
        members = x[self.group]
        relative = minimum_image(members - members[0], self.box)
        shape = relative - jnp.mean(relative, axis=0)
        if self.group.shape[0] > 1:
            shape = shape @ random_rotation(key_turn, dimension, x.dtype).T
        centre = jax.random.uniform(key_place, (dimension,), dtype=x.dtype) * self.box
        return x.at[self.group].set(wrap_positions(centre + shape, self.box))

    def description(self) -> str:
        count = int(jnp.sum(self.nonbonded.alchemical))
        stages = (f"charges off for λ ≤ {self.electrostatics_share:g}, then soft-core LJ off"
                  if self.electrostatics_share > 0 else "soft-core LJ off")
        extra = super().description() if (self.changed_a or self.only_a or self.only_b) else ""
        return (f"soft-core decoupling of {count} particle(s) ({stages}, {self.stage_form} stages, "
                f"α = {self.nonbonded.soft_core_alpha:g})" + (f"; {extra}" if extra else ""))


SKIN_PER_CUTOFF = 0.12


def _carried_builder(term: Nonbonded, box, capacity: int) -> NeighbourListBuilder | None:
    """The skin list for dynamics: capacity scaled from the cutoff-only list by the volume ratio
    (×1.2 spare; an overflow later grows it); the skin shrinks to fit half the box, or none."""
    import numpy as np
    dimension = int(box.shape[0])
    skin = min(SKIN_PER_CUTOFF * term.cutoff, 0.5 * float(np.min(np.asarray(box))) - term.cutoff)
    if skin <= 0.02 * term.cutoff:
        return None
    scaled = int(1.2 * capacity * ((term.cutoff + skin) / term.cutoff) ** dimension) + 64
    return neighbour_list_builder(term.n_particles, box, term.cutoff, float(skin), scaled,
                                  exclusions=term.exclusions, dimension=dimension)


def random_rotation(key, dimension: int, dtype=None) -> Array:
    """A uniformly distributed (Haar) rotation matrix: 3-D from a normalised Gaussian
    quaternion (Shoemake 1992, Graphics Gems III [mem]), 2-D from a uniform angle."""
    dtype = dtype or jnp.result_type(float)
    if dimension == 2:
        angle = jax.random.uniform(key, (), dtype=dtype) * 2.0 * jnp.pi
        c, s = jnp.cos(angle), jnp.sin(angle)
        return jnp.array([[c, -s], [s, c]])
    if dimension != 3:
        raise ValueError(f"random rotations are defined here for 2 or 3 dimensions, not {dimension}.")
    q = jax.random.normal(key, (4,), dtype=dtype)
    w, a, b, c = q / jnp.sqrt(jnp.sum(q * q))
    return jnp.array([
        [1 - 2 * (b * b + c * c), 2 * (a * b - c * w), 2 * (a * c + b * w)],
        [2 * (a * b + c * w), 1 - 2 * (a * a + c * c), 2 * (b * c - a * w)],
        [2 * (a * c - b * w), 2 * (b * c + a * w), 1 - 2 * (a * a + b * b)],
    ])


# terms whose energy depends only on the relative geometry of each row of particles
_ROW_TERMS = {terms.HarmonicBonds: "bonds", terms.HarmonicAngles: "angles", terms.PeriodicTorsions: "torsions",
              terms.RyckaertBellemansTorsions: "torsions", terms.ScaledPairs: "pairs",
              terms.DistanceRestraints: "pairs"}


def _term_obstacle(term: Term, mask, extra: bool) -> str:
    """Why ``term`` keeps the group from a rigid redraw at λ = 1, or "" (host side, conservative)."""
    import numpy as np
    if type(term) in _ROW_TERMS:
        rows = np.asarray(getattr(term, _ROW_TERMS[type(term)]))
        inside = mask[rows.reshape(len(rows), -1)] if rows.size else np.zeros((0, 1), bool)
        if extra and inside.any():
            return f"the interpolated term {term.name!r} involves group particles"
        if np.any(inside.any(axis=1) & ~inside.all(axis=1)):
            return f"term {term.name!r} joins group particles to particles outside the group"
        return ""
    if type(term) is terms.PositionRestraints:
        if np.any(mask[np.asarray(term.indices).reshape(-1)]):
            return f"term {term.name!r} restrains group particles to fixed positions"
        return ""
    return f"term {getattr(term, 'name', '?')!r} is of a kind whose particles are not known"


def _redraw_obstacle(term: Nonbonded, box, shared, extra) -> str:
    """The reason a redraw of the decoupled group would not keep π_B, or "" when it does.

    Conditions: a periodic box; ``decouple_internal`` (the group's internal pairs are the same at
    both ends); no shared term joins group and non-group particles or pins group particles
    (bonds, angles, torsions, scaled pairs and distance restraints are checked row by row,
    position restraints by index, any other kind refuses); no interpolated term touches the group.
    """
    import numpy as np
    if box is None:
        return "the model has no periodic box (a uniform position needs one)"
    if not term.decouple_internal:
        return "decouple_internal is off, so the group's internal pairs change along the path"
    mask = np.asarray(term.alchemical)
    for t in shared:  # a handful of terms, on the host
        reason = _term_obstacle(t, mask, extra=False)
        if reason:
            return reason
    for t in extra:
        reason = _term_obstacle(t, mask, extra=True)
        if reason:
            return reason
    return ""


def _uniform_pairs(n: int, box, radius: float) -> float:
    """Pairs within ``radius`` of n particles spread uniformly in ``box`` (minimum image, radius < half the box)."""
    import math

    import numpy as np
    edges = np.asarray(box, dtype=float)
    dimension = edges.size
    ball = math.pi * radius**2 if dimension == 2 else 4.0 / 3.0 * math.pi * radius**3
    return 0.5 * n * (n - 1) * min(1.0, ball / float(np.prod(edges)))


def _group_is_charged(term: Nonbonded) -> bool:
    if term.charges is None:
        return False
    import numpy as np
    charges = np.asarray(term.charges)
    mask = np.asarray(term.alchemical)
    return bool(np.any(charges[mask] != 0.0) and np.any(charges[~mask] != 0.0))


__all__ = ["ParameterInterpolationPath", "SoftCoreDecouplingPath", "interpolate_term", "random_rotation",
           "stage_couplings", "stage_shape", "STAGE_SHAPES"]
