"""Background (shutter closed) of every port, interpolated in time, and the error its subtraction leaves.

The background under a reading is the linear interpolation in time of the shutter-closed readings
of its port (constant before the first and after the last). Every reading between two background
readings shares their noise, so the error of the subtraction is common to many readings and does
not average out in the fit as reading noise does; ``draw_errors`` draws it for the bootstrap.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np


@dataclass(frozen=True)
class BackgroundModel:
    """Background readings (n_bg, n_ports) at times (n_bg,), and the noise of one such reading per port."""

    times_s: np.ndarray
    values: np.ndarray
    sigma: np.ndarray

    @property
    def applied(self) -> bool:
        return self.times_s.size > 0

    def weights(self, t_s: np.ndarray) -> np.ndarray:
        """(n, n_bg) linear-interpolation weights of the background readings at ``t_s``."""
        t = np.asarray(t_s, dtype=float)
        eye = np.eye(self.times_s.size)
        return np.column_stack([np.interp(t, self.times_s, eye[k]) for k in range(self.times_s.size)])

    def at(self, t_s: np.ndarray) -> np.ndarray:
        """(n, n_ports) background under readings taken at ``t_s`` (zeros without background)."""
        t = np.asarray(t_s, dtype=float)
        if not self.applied:
            return np.zeros((t.size, self.values.shape[1] if self.values.ndim == 2 else 0))
        return self.weights(t) @ self.values

    def draw_errors(self, t_s: np.ndarray, n: int, rng: np.random.Generator) -> np.ndarray:
        """(n, len(t), n_ports) draws of the error of the subtracted background at ``t_s``."""
        t = np.asarray(t_s, dtype=float)
        n_ports = self.sigma.size
        if not self.applied:
            return np.zeros((n, t.size, n_ports))
        e = rng.standard_normal((n, self.times_s.size, n_ports)) * self.sigma[None, None, :]
        return np.einsum("tk,rkp->rtp", self.weights(t), e)


def background_model(times_s: np.ndarray, values: np.ndarray, fallback_sigma: np.ndarray | None = None) -> BackgroundModel:
    """Model from the shutter-closed readings (n_bg, n_ports).

    The noise of one background reading is their spread pooled over the ports (one number, as
    the meters of a bench are alike; the pooled estimate has n_ports (n_bg - 1) degrees of
    freedom instead of n_bg - 1); with a single background reading, ``fallback_sigma`` (e.g. the
    absolute noise found from repeated readings) or zero.
    """
    t = np.asarray(times_s, dtype=float)
    v = np.asarray(values, dtype=float)
    n_ports = v.shape[1] if v.ndim == 2 else 0
    if t.size >= 2:
        pooled = float(np.sqrt(np.mean(v.var(axis=0, ddof=1))))
        sigma = np.full(n_ports, pooled)
    elif fallback_sigma is not None:
        sigma = np.broadcast_to(np.asarray(fallback_sigma, dtype=float), (n_ports,)).copy()
    else:
        sigma = np.zeros(n_ports)
    order = np.argsort(t)
    return BackgroundModel(t[order], v[order], sigma)


def pooled_reading_noise(model: BackgroundModel, other_sigma: np.ndarray, other_dof: int) -> BackgroundModel:
    """The model with the noise of a background reading pooled with another estimate of the same
    meters' absolute noise (e.g. from repeated readings, at the same dwell): variances weighted by
    their degrees of freedom. A few background readings alone estimate it poorly (two readings on
    four ports: 4 degrees of freedom, a std uncertain by about 35 %), and its error is shared by
    every reading of a port."""
    if not model.applied or other_dof <= 0:
        return model
    own_dof = model.sigma.size * max(model.times_s.size - 1, 0)
    other = np.broadcast_to(np.asarray(other_sigma, dtype=float), model.sigma.shape)
    var = (own_dof * model.sigma**2 + other_dof * other**2) / (own_dof + other_dof)
    return BackgroundModel(model.times_s, model.values, np.sqrt(var))


def background_info(model: BackgroundModel) -> dict[str, Any]:
    """What was subtracted, for the result document."""
    if not model.applied:
        return {"applied": False, "readings": 0}
    return {
        "applied": True,
        "readings": int(model.times_s.size),
        "mean_per_port": [float(x) for x in model.values.mean(axis=0)],
        "std_per_port": [float(x) for x in (model.values.std(axis=0, ddof=1) if model.times_s.size > 1
                                            else np.zeros(model.values.shape[1]))],
        "reading_noise": [float(x) for x in model.sigma],
        "propagated": "the interpolated background's error is drawn in every bootstrap replicate",
    }
