"""Single-particle Lagrangian statistics of a particle set, accumulated in-situ with multiple time
origins: the velocity autocorrelation and the mean-square displacement at lags 0..K samples.

A :class:`LagrangianCorrelator` keeps, for a fixed subsample of M particles, the velocities and
unwrapped positions (x + image L) of the last K + 1 samples in a ring buffer. At each new sample
n (time t_n) it forms, for every lag k = 0..K whose origin n − k is held, sums over the M
particles (one row of each quantity per sample, one column per lag):

    count      M (0 where sample n − k is not held yet)
    lag_time   t_n − t_{n−k}
    vv         Σ_p v_p(t_n) · v_p(t_{n−k})            (the three components summed)
    v_start    Σ_p v_p(t_{n−k}),   v_end  Σ_p v_p(t_n)    (vectors: means for the covariance)
    dx2        Σ_p |X_p(t_n) − X_p(t_{n−k})|²          (X the unwrapped position)
    dx         Σ_p (X_p(t_n) − X_p(t_{n−k}))           (vector: the mean drift)

Summed over the samples of a window, each row pools every time origin once per lag (the
multiple-time-origin average of molecular dynamics; Allen & Tildesley 1987, Computer Simulation
of Liquids, §6.3; from memory); the estimators are in `eddybox.solver.estimators.lagrangian`.

Memory: kept per particle of the subsample, (K + 1) velocities and (K + 1) positions, 3 float64
each: 48 (K + 1) bytes (:func:`history_bytes`), held on one rank only. The cost of a sample is
O(M K).
"""
from __future__ import annotations

import numpy as np

__all__ = ["ROW_FIELDS", "LagrangianCorrelator", "history_bytes"]

#: the quantities of one row: name -> (shape of one entry per lag, dtype)
ROW_FIELDS = {
    "count": ((), np.int64),
    "lag_time": ((), np.float64),
    "vv": ((), np.float64),
    "v_start": ((3,), np.float64),
    "v_end": ((3,), np.float64),
    "dx2": ((), np.float64),
    "dx": ((3,), np.float64),
}


def history_bytes(particles: int, lags: int) -> int:
    """Bytes of the ring buffer of a correlator of `particles` particles and `lags` lags."""
    return 2 * (lags + 1) * particles * 3 * 8 + (lags + 1) * 8


class LagrangianCorrelator:
    """The ring buffer and row sums described in the module docstring, for M particles and lags
    0..K. `add(t, v, x)` takes the velocities and unwrapped positions (M, 3) of the same
    particles in the same order at every sample and returns the row of sums."""

    def __init__(self, particles: int, lags: int):
        if particles < 1 or lags < 1:
            raise ValueError(f"a correlator needs particles >= 1 and lags >= 1, got "
                             f"{particles}, {lags}")
        self.particles, self.lags = int(particles), int(lags)
        self.v = np.zeros((lags + 1, particles, 3))
        self.x = np.zeros((lags + 1, particles, 3))
        self.t = np.full(lags + 1, np.nan)
        self.head = -1  # slot of the newest sample
        self.filled = 0  # samples held (at most lags + 1)

    @property
    def nbytes(self) -> int:
        return self.v.nbytes + self.x.nbytes + self.t.nbytes

    def add(self, t: float, v, x) -> dict:
        """Store the sample at time t and return its row (arrays over lags 0..K)."""
        v = np.asarray(v, dtype=np.float64)
        x = np.asarray(x, dtype=np.float64)
        if v.shape != (self.particles, 3) or x.shape != v.shape:
            raise ValueError(f"a sample holds ({self.particles}, 3) velocities and positions, "
                             f"got {v.shape} and {x.shape}")
        self.head = (self.head + 1) % (self.lags + 1)
        self.v[self.head], self.x[self.head], self.t[self.head] = v, x, t
        self.filled = min(self.filled + 1, self.lags + 1)
        row = {k: np.zeros((self.lags + 1,) + shape, dtype) for k, (shape, dtype)
               in ROW_FIELDS.items()}
        v_sum = v.sum(axis=0)
        for k in range(self.filled):
            slot = (self.head - k) % (self.lags + 1)
            v0, x0 = self.v[slot], self.x[slot]
            d = x - x0
            row["count"][k] = self.particles
            row["lag_time"][k] = t - self.t[slot]
            row["vv"][k] = np.einsum("pi,pi->", v, v0)
            row["v_start"][k] = v0.sum(axis=0)
            row["v_end"][k] = v_sum
            row["dx2"][k] = np.einsum("pi,pi->", d, d)
            row["dx"][k] = d.sum(axis=0)
        return row

    def state(self) -> dict:
        return {"v": self.v, "x": self.x, "t": self.t, "head": np.int64(self.head),
                "filled": np.int64(self.filled)}

    def load_state(self, st):
        v = np.asarray(st["v"], dtype=np.float64)
        if v.shape != self.v.shape:
            raise ValueError(f"the checkpoint's Lagrangian history has shape {v.shape}, this run "
                             f"keeps {self.v.shape}")
        self.v[...] = v
        self.x[...] = np.asarray(st["x"], dtype=np.float64)
        self.t[...] = np.asarray(st["t"], dtype=np.float64)
        self.head, self.filled = int(st["head"]), int(st["filled"])
