r"""A pair-force control for particle systems: learned radial forces on the changing particles.

For configurations x of shape (N, d) (usually d = 3) with a set 𝒜 of *alchemical*
(changing) particles, the velocity along λ is a sum of equal-and-opposite pair terms
between each alchemical particle and every other particle:

    v_i(x, λ) = Σ_{pairs (a, j) ∋ i} ± f_θ(r_aj, λ, t_aj) r̂_aj,    r_aj = |x_a − x_j|_mi,
    f_θ(r, λ, t) = s · c(r) · MLP([g(r), e(λ), t]),

with ``+`` on a and ``−`` on j, r the minimum-image distance in an orthorhombic box
(or the plain distance with open boundaries), r̂ the unit vector from j to a,
g(r) a Gaussian radial basis on [0, r_c], c(r) = ½(1 + cos πr/r_c) for r < r_c
(0 beyond; smooth at r_c, so the minimum image never makes the control jump when
r_c ≤ L/2), e(λ) the Fourier λ embedding of :func:`lambda_embedding`, t a flag
for alchemical–alchemical pairs, and s a fixed length scale (default r_c/4).

Consequences, by construction:

* translation invariant, rotation equivariant (f depends on distances only; the
  direction is the pair vector), and equivariant under permutations of identical
  particles (one f for all pairs of a kind);
* Σ_i v_i = 0 (each pair contributes +F and −F): the control never drifts the
  centre of mass;
* O(|𝒜| · N) pair terms per call (pairs not involving an alchemical particle are
  never formed);
* the MLP output layer is zero, so v ≡ 0 at initialisation (uncontrolled switching).

The drift bound b of :class:`fe_tool.control.protocol.ProtocolDrift` is one number
per particle class (alchemical / other): the root mean square of the per-coordinate
bound it is given, so permutation equivariance also holds for the bounded drift
(the component-wise tanh of the bound is rotation equivariant only in its linear
regime, |ρv| ≪ b).

Selecting it: ``prepare_control`` builds a fresh control with kind ``"mlp"``; pass a
ready :class:`PairForceControl` as ``warm_start`` (``PairForceControl.from_path``
builds one with the path's alchemical particles, box and cutoff and a drift bound from
forces at given configurations), or ``build_control("pair_force", shape, scales,
key=..., **pair_force_settings(path))`` in code that builds controls by kind.
"""
from __future__ import annotations

from typing import Any, ClassVar

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np

from ..energy.box import check_cutoff, pair_displacements
from .networks import Control, ControlScales, lambda_embedding, register_control

SOFT_DISTANCE = 1e-3
"""r̂ = d / sqrt(r² + (δ r_c)²) with δ = this: finite (and zero) at coincident particles."""


def _alchemical_indices(path) -> list[int]:
    term = getattr(path, "nonbonded", None)
    mask = None if term is None else getattr(term, "alchemical", None)
    if mask is None:
        raise ValueError("the path has no alchemical particles (a SoftCoreDecouplingPath is needed); pass "
                         "alchemical=[...] explicitly")
    return [int(i) for i in np.flatnonzero(np.asarray(mask))]


def pair_force_settings(path, cutoff: float | None = None) -> dict[str, Any]:
    """``alchemical``, ``box`` and ``cutoff`` of a :class:`PairForceControl` for a decoupling path.

    The cutoff defaults to the nonbonded cutoff, capped at half the shortest box edge
    (open boundaries without a nonbonded cutoff: 2.5 × the largest LJ σ).
    """
    alchemical = _alchemical_indices(path)
    box = getattr(path, "box", None)
    box = None if box is None else [float(b) for b in np.asarray(box).reshape(-1)]
    if cutoff is None:
        term = path.nonbonded
        cutoff = getattr(term, "cutoff", None)
        if cutoff is None:
            lj = getattr(term, "lennard_jones", None)
            sigma = None if lj is None else getattr(lj, "sigma", None)
            cutoff = 2.5 * float(np.max(np.asarray(sigma))) if sigma is not None else None
        if box is not None:
            half = 0.5 * min(box)
            cutoff = half if cutoff is None else min(float(cutoff), half)
    if cutoff is None:
        raise ValueError("give cutoff= (no box and no nonbonded cutoff to take it from)")
    return {"alchemical": alchemical, "box": box, "cutoff": float(cutoff)}


def _pair_lists(n: int, alchemical: tuple[int, ...]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(first, second, both_alchemical) over every pair with at least one alchemical particle, each once."""
    mask = np.zeros(n, bool)
    mask[list(alchemical)] = True
    first, second = [], []
    for a in sorted(alchemical):
        for j in range(n):
            if j == a or (mask[j] and j < a):  # alchemical–alchemical pairs once (a < j)
                continue
            first.append(a)
            second.append(j)
    first, second = np.asarray(first, np.int32), np.asarray(second, np.int32)
    return first, second, mask[second].astype(np.float64)


@register_control
class PairForceControl(Control):
    """Velocity from learned, λ-dependent radial pair forces between alchemical and all other particles.

    Args:
        shape: configuration shape (N, d).
        scales: :class:`ControlScales` (only its drift ``bound`` is used, averaged per
            particle class); ``None`` gives a bound of 1.
        key: PRNG key for the hidden layers (keyword-only).
        alchemical: indices of the changing particles (required unless ``path`` is given).
        box: orthorhombic box edges (d,) or a scalar, or ``None`` for open boundaries.
        cutoff: range r_c of the pair force (≤ half the shortest box edge).
        width, depth: hidden width and number of hidden layers of f_θ.
        basis: number of Gaussian radial basis functions on [0, r_c].
        frequencies: Fourier frequencies of the λ embedding.
        scale: output length scale s (default r_c / 4).
        path: a decoupling path to take ``alchemical``, ``box`` and ``cutoff`` from
            (explicit arguments win; other paths only give their ``box``); not stored.

    Example:
        >>> c = PairForceControl((8, 3), None, alchemical=[0], cutoff=3.0, key=jax.random.key(0))
        >>> c(x, 0.5)        # zeros until trained; shape (8, 3)
    """

    kind: ClassVar[str] = "pair_force"
    shape: tuple[int, ...] = eqx.field(static=True)
    alchemical: tuple[int, ...] = eqx.field(static=True)
    box: tuple[float, ...] | None = eqx.field(static=True)
    cutoff: float = eqx.field(static=True)
    width: int = eqx.field(static=True)
    depth: int = eqx.field(static=True)
    basis: int = eqx.field(static=True)
    frequencies: int = eqx.field(static=True)
    scale: float = eqx.field(static=True)
    mlp: eqx.nn.MLP
    bound: jax.Array  # (N, d), one value per particle class (not trained)

    def __init__(self, shape, scales: ControlScales | None = None, *, key, alchemical=None, box=None,
                 cutoff: float | None = None, width: int = 32, depth: int = 2, basis: int = 12,
                 frequencies: int = 3, scale: float | None = None, path=None):
        self.shape = tuple(int(s) for s in shape)
        if len(self.shape) != 2:
            raise ValueError(f"PairForceControl needs particle configurations of shape (N, d); got {self.shape}")
        n, dim = self.shape
        if path is not None and getattr(path, "nonbonded", None) is not None:
            defaults = pair_force_settings(path, cutoff)
            alchemical = defaults["alchemical"] if alchemical is None else alchemical
            box = defaults["box"] if box is None else box
            cutoff = defaults["cutoff"] if cutoff is None else cutoff
        elif path is not None and box is None and getattr(path, "box", None) is not None:
            box = [float(b) for b in np.asarray(path.box).reshape(-1)]
        if alchemical is None:
            raise ValueError("give alchemical=[indices of the changing particles] (or path=)")
        alchemical = tuple(sorted({int(i) for i in np.asarray(alchemical).reshape(-1)}))
        if not alchemical or min(alchemical) < 0 or max(alchemical) >= n:
            raise ValueError(f"alchemical indices must be in [0, {n}); got {list(alchemical)}")
        if box is not None:
            box_np = np.asarray(box, dtype=np.float64).reshape(-1)
            box_np = np.full(dim, box_np[0]) if box_np.size == 1 else box_np
            if box_np.shape != (dim,) or np.any(box_np <= 0):
                raise ValueError(f"box must be None, a positive scalar or {dim} positive edges; got {box}")
            box = tuple(float(b) for b in box_np)
        if cutoff is None:
            if box is None:
                raise ValueError("give cutoff= for open boundaries")
            cutoff = 0.5 * min(box)
        cutoff = float(cutoff)
        if not cutoff > 0:
            raise ValueError(f"cutoff must be positive, got {cutoff}")
        check_cutoff(None if box is None else np.asarray(box), cutoff)
        self.alchemical, self.box, self.cutoff = alchemical, box, cutoff
        self.width, self.depth = int(width), int(depth)
        self.basis, self.frequencies = int(basis), int(frequencies)
        self.scale = float(0.25 * cutoff if scale is None else scale)
        dtype = jnp.result_type(float)
        features = self.basis + 2 * self.frequencies + 1 + 1
        mlp = eqx.nn.MLP(features, "scalar", self.width, self.depth, activation=jax.nn.silu, dtype=dtype, key=key)
        last = mlp.layers[-1]
        self.mlp = eqx.tree_at(lambda m: (m.layers[-1].weight, m.layers[-1].bias), mlp,
                               (jnp.zeros_like(last.weight), jnp.zeros_like(last.bias)))
        mask = np.zeros(n, bool)
        mask[list(alchemical)] = True
        bound = np.ones(n * dim) if scales is None else np.asarray(scales.bound, np.float64)
        bound = np.broadcast_to(bound, (n * dim,)).reshape(n, dim)
        per_class = np.empty((n, dim))
        for group in (mask, ~mask):
            if group.any():
                per_class[group] = np.sqrt(np.mean(bound[group] ** 2))
        self.bound = jnp.asarray(per_class, dtype)

    # ------------------------------------------------------------------ the model
    def radial_basis(self, r):
        """Gaussian features g(r) (…, basis) on [0, r_c]."""
        centres = jnp.linspace(0.0, self.cutoff, self.basis, dtype=r.dtype)
        width = self.cutoff / max(self.basis - 1, 1)
        return jnp.exp(-0.5 * ((r[..., None] - centres) / width) ** 2)

    def envelope(self, r):
        """c(r) = ½(1 + cos πr/r_c) inside the cutoff, 0 outside."""
        inside = r < self.cutoff
        return jnp.where(inside, 0.5 * (1.0 + jnp.cos(jnp.pi * jnp.minimum(r, self.cutoff) / self.cutoff)), 0.0)

    def pair_magnitudes(self, r, lam, both_alchemical=None):
        """f_θ(r, λ, t) for distances ``r`` (P,): positive pushes the pair apart."""
        lam = jnp.asarray(lam, dtype=r.dtype)
        t = jnp.zeros_like(r) if both_alchemical is None else jnp.asarray(both_alchemical, r.dtype)
        e = jnp.broadcast_to(lambda_embedding(lam, self.frequencies), r.shape + (2 * self.frequencies + 1,))
        inputs = jnp.concatenate([self.radial_basis(r), e, t[:, None]], axis=-1)
        return self.scale * self.envelope(r) * jax.vmap(self.mlp)(inputs)

    def __call__(self, x, lam):
        if x.shape != self.shape:
            raise ValueError(f"this control is for configurations of shape {self.shape}; got {x.shape}")
        first, second, both = _pair_lists(self.shape[0], self.alchemical)
        box = None if self.box is None else jnp.asarray(self.box, dtype=x.dtype)
        d = pair_displacements(x, first, second, box)  # x_a − x_j (minimum image)
        r2 = jnp.sum(d * d, axis=-1)
        positive = r2 > 0.0
        r = jnp.where(positive, jnp.sqrt(jnp.where(positive, r2, 1.0)), 0.0)
        unit = d / jnp.sqrt(r2 + (SOFT_DISTANCE * self.cutoff) ** 2)[:, None]
        f = self.pair_magnitudes(r, lam, both)
        force = f[:, None] * unit
        v = jnp.zeros(self.shape, x.dtype).at[first].add(force).at[second].add(-force)
        return v

    def drift_bound(self):
        return jax.lax.stop_gradient(self.bound)

    def trainable(self):
        spec = jax.tree_util.tree_map(eqx.is_inexact_array, self)
        return eqx.tree_at(lambda c: c.bound, spec, replace=False)

    def hyperparameters(self):
        return {"shape": list(self.shape), "alchemical": list(self.alchemical),
                "box": None if self.box is None else list(self.box), "cutoff": self.cutoff, "width": self.width,
                "depth": self.depth, "basis": self.basis, "frequencies": self.frequencies, "scale": self.scale}

    @classmethod
    def skeleton(cls, hyperparameters):
        h = dict(hyperparameters)
        shape = tuple(h.pop("shape"))
        return cls(shape, None, key=jax.random.key(0), **h)

    @classmethod
    def from_path(cls, path, configurations, *, key, bound_factor: float = 5.0, lam: float = 0.0,
                  **hyperparameters) -> "PairForceControl":
        """A zero-initialised control for ``path`` with a drift bound from the forces at ``configurations``.

        The bound is ``bound_factor`` × the RMS reduced force |∇u(x, λ)| per coordinate
        over ``configurations`` (n, N, d) at ``lam`` (unpreconditioned, as the particle
        samplers run), one value per particle class. Pass the result as ``warm_start=``
        of :func:`fe_tool.control.prepare_control` (with an explicit ``learning_rate``).
        """
        configurations = jnp.asarray(configurations)
        if configurations.ndim == 2:
            configurations = configurations[None]
        grads = jax.vmap(lambda x: path.energy_and_grad(x, jnp.asarray(lam, x.dtype))[1])(configurations)
        g = np.asarray(grads, dtype=np.float64)
        rms = np.sqrt(np.mean(np.where(np.isfinite(g), g, 0.0) ** 2, axis=0)).reshape(-1)
        typical = float(np.median(rms)) if np.any(rms > 0) else 1.0
        rms = np.maximum(rms, 1e-3 * max(typical, 1e-12))
        shape = tuple(configurations.shape[1:])
        size = int(np.prod(shape))
        neutral = ControlScales.neutral(size)
        scales = ControlScales(neutral.centre_a, neutral.centre_b, neutral.spread, neutral.output_scale,
                               jnp.asarray(bound_factor * rms))
        return cls(shape, scales, key=key, path=path, **hyperparameters)


__all__ = ["PairForceControl", "pair_force_settings"]
