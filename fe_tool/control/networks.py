r"""Learned controls: transport velocities v(x, λ) as equinox modules.

A control here is a *velocity along λ*: ``control(x, λ)`` returns dx/dλ with the
shape of ``x``.  The drift that enters the switching kernel (see
:mod:`fe_tool.switching`) is obtained by binding the velocity to a protocol,

    φ(x, λ_j) = b ⊙ tanh( ρ_j v(x, λ_j) / b ),      ρ_j ≈ Δλ_j / ε_j,

(:class:`fe_tool.control.protocol.ProtocolDrift`): the move a step makes because of
the control, ε_j φ ≈ Δλ_j v, is then the same whatever the number of steps K or the
step sizes, so a control trained with short protocols transfers to long ones, and
to a learned schedule.  ``b`` bounds the drift smoothly at a multiple of the typical
size of the preconditioned force M∇u (measured on uncontrolled paths), so a
control used where it was never trained (e.g. on reverse paths) cannot push a
trajectory arbitrarily far in one step.

Every control derives from :class:`Control`.  :class:`MLPControl` flattens the
configuration (N×3 coordinates become a vector of 3N), so it suits vector systems
and small particle systems; a permutation/rotation-equivariant pair-force control
plugs in by subclassing :class:`Control` and registering itself with
:func:`register_control` (needed by :func:`fe_tool.control.load_control`).

The network (Vargas, Padhy, Blessing & Nüsken 2024, "Transport meets variational
inference: controlled Monte Carlo diffusions", ICLR) is

    z = (x − c(λ)) / s,   c(λ) = (1 − λ) μ_A + λ μ_B,   e = embed(λ)
    v(x, λ) = σ_out ⊙ [ MLP([z, e]) + (G e) ⊙ z + H e ],

where μ, s are the end-state sample means and spreads, ``embed`` is a smooth
Fourier embedding of λ and G, H are λ-dependent diagonal affine terms (exact for
Gaussian end states: the transport between two Gaussians is affine in x).  The
output layer of the MLP, G and H start at zero, so training starts exactly from
uncontrolled switching.
"""
from __future__ import annotations

from typing import Any, ClassVar

import equinox as eqx
import jax
import jax.numpy as jnp
import numpy as np

from ..types import Array, Configuration

CONTROL_KINDS: dict[str, type["Control"]] = {}
"""Registered control classes by ``kind`` (used to rebuild saved controls)."""


def register_control(cls: type["Control"]) -> type["Control"]:
    """Class decorator: make a :class:`Control` subclass loadable by its ``kind``."""
    if not getattr(cls, "kind", None):
        raise ValueError(f"{cls.__name__} needs a class attribute kind = '<name>' to be registered")
    CONTROL_KINDS[cls.kind] = cls
    return cls


class Control(eqx.Module):
    """Abstract control: a transport velocity v(x, λ) = dx/dλ (shape of x).

    Subclasses implement :meth:`__call__`, :meth:`drift_bound`,
    :meth:`hyperparameters` and :meth:`skeleton`, and may override
    :meth:`trainable` to freeze parts (normalisation constants) during training.
    """

    kind: ClassVar[str] = ""

    def __call__(self, x: Configuration, lam: Array) -> Array:  # pragma: no cover - abstract
        raise NotImplementedError

    def drift_bound(self) -> Array:  # pragma: no cover - abstract
        """Per-coordinate bound b of the drift (broadcastable to a configuration)."""
        raise NotImplementedError

    def hyperparameters(self) -> dict[str, Any]:  # pragma: no cover - abstract
        """JSON-able settings from which :meth:`skeleton` rebuilds the structure."""
        raise NotImplementedError

    @classmethod
    def skeleton(cls, hyperparameters: dict[str, Any]) -> "Control":  # pragma: no cover - abstract
        """A module of the right structure (values arbitrary), to deserialise into."""
        raise NotImplementedError

    def trainable(self) -> Any:
        """Filter tree: True on the leaves an optimiser may change (default: all float arrays)."""
        return jax.tree_util.tree_map(eqx.is_inexact_array, self)


def lambda_embedding(lam: Array, frequencies: int) -> Array:
    """Smooth features of λ: [λ − ½, sin(nπλ), cos(nπλ) for n = 1…frequencies]."""
    lam = jnp.asarray(lam)
    n = jnp.arange(1, frequencies + 1, dtype=lam.dtype)
    return jnp.concatenate([jnp.reshape(lam - 0.5, (1,)), jnp.sin(n * jnp.pi * lam), jnp.cos(n * jnp.pi * lam)])


class ControlScales(eqx.Module):
    """Fixed normalisation of a control (not trained), all flat vectors of length d.

    Attributes:
        centre_a, centre_b: end-state sample means μ_A, μ_B.
        spread: coordinate scale s (root mean of the end-state variances).
        output_scale: σ_out = sqrt(s² + (μ_B − μ_A)²), the typical displacement along λ.
        bound: drift bound b (same units as M∇u).
    """

    centre_a: Array
    centre_b: Array
    spread: Array
    output_scale: Array
    bound: Array

    @classmethod
    def from_samples(cls, samples_a, samples_b, bound) -> "ControlScales":
        a = np.asarray(samples_a, dtype=np.float64).reshape(len(samples_a), -1)
        b = np.asarray(samples_b, dtype=np.float64).reshape(len(samples_b), -1)
        mu_a, mu_b = a.mean(axis=0), b.mean(axis=0)
        spread = np.sqrt(0.5 * (a.var(axis=0) + b.var(axis=0)))
        floor = max(float(np.median(spread)), 1e-12) * 1e-3
        spread = np.maximum(spread, floor)
        output_scale = np.sqrt(spread**2 + (mu_b - mu_a) ** 2)
        bound = np.asarray(bound, dtype=np.float64)
        bound = np.broadcast_to(bound.reshape(-1) if bound.size > 1 else bound.reshape(()), mu_a.shape)
        as_jnp = lambda v: jnp.asarray(v, dtype=jnp.result_type(float))  # noqa: E731
        return cls(as_jnp(mu_a), as_jnp(mu_b), as_jnp(spread), as_jnp(output_scale), as_jnp(np.array(bound)))

    @classmethod
    def neutral(cls, size: int) -> "ControlScales":
        one, zero = jnp.ones((size,)), jnp.zeros((size,))
        return cls(zero, zero, one, one, one)


@register_control
class MLPControl(Control):
    """Velocity v(x, λ) from an MLP on the flattened, normalised configuration and a λ embedding.

    Args:
        shape: configuration shape (e.g. ``(d,)`` or ``(n, 3)``).
        scales: :class:`ControlScales` from end-state samples (and the drift bound).
        width, depth: hidden width and number of hidden layers of the MLP.
        frequencies: number of Fourier frequencies in the λ embedding.
        key: PRNG key for the hidden-layer initialisation (keyword-only).

    The MLP output layer and the affine terms are zero, so v ≡ 0 at initialisation.

    Example:
        >>> c = MLPControl((3,), ControlScales.neutral(3), key=jax.random.key(0))
        >>> c(jnp.ones(3), 0.5)          # zeros until trained
    """

    kind: ClassVar[str] = "mlp"
    shape: tuple[int, ...] = eqx.field(static=True)
    width: int = eqx.field(static=True)
    depth: int = eqx.field(static=True)
    frequencies: int = eqx.field(static=True)
    mlp: eqx.nn.MLP
    affine_gain: Array  # (d, E): λ-dependent diagonal gain on z
    affine_shift: Array  # (d, E): λ-dependent shift (mean transport)
    scales: ControlScales

    def __init__(self, shape, scales: ControlScales, width: int = 64, depth: int = 2, frequencies: int = 4, *, key):
        self.shape = tuple(int(s) for s in shape)
        self.width, self.depth, self.frequencies = int(width), int(depth), int(frequencies)
        size = int(np.prod(self.shape))
        features = 2 * self.frequencies + 1
        dtype = jnp.result_type(float)
        mlp = eqx.nn.MLP(size + features, size, self.width, self.depth, activation=jax.nn.silu, dtype=dtype, key=key)
        last = mlp.layers[-1]
        mlp = eqx.tree_at(lambda m: (m.layers[-1].weight, m.layers[-1].bias), mlp,
                          (jnp.zeros_like(last.weight), jnp.zeros_like(last.bias)))
        self.mlp = mlp
        self.affine_gain = jnp.zeros((size, features), dtype)
        self.affine_shift = jnp.zeros((size, features), dtype)
        if scales.centre_a.shape != (size,):
            raise ValueError(f"scales are for {scales.centre_a.shape[0]} coordinates but shape {self.shape} has {size}")
        self.scales = scales

    def __call__(self, x, lam):
        s = jax.lax.stop_gradient(self.scales)
        lam = jnp.asarray(lam, dtype=x.dtype)
        flat = x.reshape(-1)
        centre = (1.0 - lam) * s.centre_a + lam * s.centre_b
        z = (flat - centre) / s.spread
        e = lambda_embedding(lam, self.frequencies)
        v = self.mlp(jnp.concatenate([z, e])) + (self.affine_gain @ e) * z + self.affine_shift @ e
        return (s.output_scale * v).reshape(x.shape)

    def drift_bound(self):
        return jax.lax.stop_gradient(self.scales.bound).reshape(self.shape)

    def trainable(self):
        spec = jax.tree_util.tree_map(eqx.is_inexact_array, self)
        return eqx.tree_at(lambda c: c.scales, spec, replace=jax.tree_util.tree_map(lambda _: False, self.scales))

    def hyperparameters(self):
        return {"shape": list(self.shape), "width": self.width, "depth": self.depth, "frequencies": self.frequencies}

    @classmethod
    def skeleton(cls, hyperparameters):
        shape = tuple(hyperparameters["shape"])
        return cls(shape, ControlScales.neutral(int(np.prod(shape))), width=hyperparameters["width"],
                   depth=hyperparameters["depth"], frequencies=hyperparameters["frequencies"], key=jax.random.key(0))


def build_control(kind: str, shape, scales: ControlScales, *, key, **hyperparameters) -> Control:
    """Make a fresh control of a registered ``kind`` (``"mlp"``) for configurations of ``shape``."""
    if kind not in CONTROL_KINDS:
        raise ValueError(f"unknown control kind {kind!r}; registered kinds are {sorted(CONTROL_KINDS)}")
    return CONTROL_KINDS[kind](shape, scales, key=key, **hyperparameters)
