"""Stochastic large-scale forcing by Ornstein-Uhlenbeck processes (Eswaran & Pope 1988), with an
optional calibration of its variance to a requested dissipation during the spin-up."""
from __future__ import annotations

import math

import numpy as np

from eddybox.forcing.band import ForcedBand
from eddybox.forcing.base import Forcing, register
from eddybox.solver.errors import ConfigError
from eddybox.solver.estimators.timeseries import block_average
from eddybox.solver.fields import Num, TimeSpan, eddy_times
from eddybox.solver.run.checkpoint import restore_rng_state, rng_state_array

#: variance updates over the calibration window, of which the first ones follow the spin-up
CALIBRATION_UPDATES = 24
CALIBRATION_SPIN_UP = 6
#: gain of the updates during the spin-up
CALIBRATION_SPIN_UP_GAIN = 0.5
#: largest factor one update may change the variance by (a guard against a noisy interval)
CALIBRATION_MAX_FACTOR = 4.0


@register("ou")
class OrnsteinUhlenbeckForcing(Forcing):
    """Eswaran, V. & Pope, S. B. (1988) "An examination of forcing in direct numerical
    simulations of turbulence", Comput. Fluids 16(3), 257-278.

    Every forced mode 0 < |k| <= band (in units of 2 pi / L) carries a complex vector b_k whose
    real and imaginary parts are independent Ornstein-Uhlenbeck processes

        db = -b dt / T_F + sqrt(2 sigma^2 / T_F) dW,

    advanced with the exact update over a step h (no time-step error in the statistics):

        b(t+h) = b(t) e^{-h/T_F} + sigma sqrt(1 - e^{-2h/T_F}) xi,   xi ~ N(0, 1).

    The force is the solenoidal projection f_k = (I - k k / k^2) b_k, held fixed within a step.
    Its variance follows from a target dissipation by the relation of Eswaran & Pope (1988),

        eps* = 4 N_F sigma^2 T_F,

    N_F the number of forced wavenumbers (both signs). It holds when T_F is short against the
    response time of the forced modes; at longer T_F the flow's response decorrelates u from
    f and the injected power <f.u> falls below eps* (eddybox measured 0.77 eps* at T_F ~ T_E/3).

    Calibration (`calibrate`: a window [0, t_c]). The variance is adjusted during the window so
    that the mean injected power P = <f.u> (in a stationary state equal to the dissipation)
    meets eps*, then frozen, so the run after t_c is a true OU process with constant sigma^2.
    The rule is stochastic approximation of the root of E[P | sigma^2] = eps* (Robbins, H. &
    Monro, S. 1951, Ann. Math. Statist. 22, 400-407) in log sigma^2, with iterate averaging
    (Polyak, B. T. & Juditsky, A. B. 1992, SIAM J. Control Optim. 30, 838-855), after a
    spin-up whose transient it must not remember:

        the window is split into 24 equal intervals; after interval j (mean power P_j),
            sigma^2 <- sigma^2 (1 - g_j (P_j / eps* - 1))   (factor clipped to [1/4, 4]),
        g_j = 1/2 for the first 6 intervals (the spin-up: the variance follows the developing
        flow and forgets it geometrically), then g_j = 1/m for the m-th interval after them;
        at t_c, sigma^2 = the mean of sigma^2 over the last 9 updates.

    Recorded in derived.forcing_calibration: the variance, the window, the power the window
    reached (`window_mean_power`, the dissipation during the calibration), and the calibrated
    variance's relative uncertainty `relative_error`: the standard error of the mean power over
    the window after the spin-up, by blocking of the per-step power, but never less than a floor
    from the forcing's own time scale (the power stays correlated for about T_F/2 at long T_F,
    which a window of a few T_F cannot show its blocking; see `_error_parts`).
    `relative_error_from` says which decided; `relative_error_established` is false, and the
    log says so, when the blocking found no plateau. In the
    README's 32^3 laptop study (40 T_E windows) the blocking errors were 4-5 % at every T_F while
    the mean eps of all samples after the window missed eps* by -3, -5, +7, +9 and +22 % at
    T_F = 1/4 to 4 T_E; the floor there is 5, 7, 7, 9 and 13 %.
    Measured at 32^3 (eps* = 0.1, band 2.83, windows of 60 predicted T_E): the stationary
    dissipation came within 2.2 %, 3.3 % and 0.4 % of eps* at T_F = 1/4, 1 and 4 T_E, with
    recorded calibration errors of 2.6 %, 3.1 % and 2.5 %. Two tempting variants were biased
    and are not used: steps in log sigma^2 find the geometric mean of the interval powers
    (+3 to +5 % in eps, Jensen's inequality), and updates that remember the spin-up carry its
    transient into the result.

    Each change of sigma^2 also rescales b by sqrt(sigma^2_new / sigma^2_old), which keeps b
    distributed as the stationary process of the new variance (no lag of T_F behind the
    update). Random numbers are drawn for the whole band from one generator seeded by `seed`,
    so every parallel layout sees the same forcing.
    """

    params = {
        "band": Num(2.0 * np.sqrt(2.0), "forced modes 0 < |k| <= band", "2π/L", lo=0.0, lo_open=True),
        "timescale": TimeSpan(1.0, "OU time scale T_F", "T", lo=0.0, lo_open=True),
        "dissipation": Num(None, "target dissipation ε*; sets σ² = ε*/(4 N_F T_F) (default 0.1)",
                           "L^2 T^-3", lo=0.0, lo_open=True),
        "variance": Num(None, "σ² of each real and imaginary part (instead of dissipation)",
                        "L^2 T^-4", lo=0.0, lo_open=True),
        "calibrate": TimeSpan(None, "calibration window [0, calibrate]: σ² is adjusted until the "
                              "mean injected power meets `dissipation`, then frozen (null: the "
                              "uncalibrated Eswaran & Pope σ²)", "T", lo=0.0, lo_open=True),
    }

    #: series this forcing adds to fluid.h5 /series/
    series_columns = {"forcing_variance": ("L^2 T^-4", "OU variance sigma^2 of each real and "
                                           "imaginary part of b_k in use at the sample")}
    moves_fluid_at_rest = True

    @staticmethod
    def check_config(f):
        if f.variance is not None and f.dissipation is not None:
            raise ConfigError("forcing: give either forcing.variance or forcing.dissipation, not both")
        if eddy_times(f.timescale) is not None and f.variance is not None:
            raise ConfigError("forcing.timescale: a time in T_E needs forcing.dissipation (T_E is "
                              "predicted from it), not forcing.variance")
        if f.calibrate is not None and f.dissipation is None:
            raise ConfigError("forcing.calibrate: needs forcing.dissipation, the dissipation to "
                              "calibrate to (not forcing.variance)")

    def __init__(self, cfg, layout, seed):
        super().__init__(cfg, layout, seed)
        self.band = ForcedBand(layout, float(cfg.band))
        self.T = float(cfg.timescale)
        self.eps_target = 0.1 if cfg.dissipation is None else float(cfg.dissipation)
        if cfg.variance is not None:
            self.sigma2 = float(cfg.variance)
            self.eps_target = None
        else:
            self.sigma2 = self.eps_target / (4.0 * self.band.n_full * self.T)
        self.sigma2_initial = self.sigma2
        self.rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence([seed, 0x0F0C])))
        n = self.band.n_independent
        self._xi = np.empty((n, 3, 2))
        self.b = np.empty((n, 3), complex)
        # start from the stationary distribution, so there is no forcing transient
        self.rng.standard_normal(out=self._xi)
        self.b[...] = np.sqrt(self.sigma2) * (self._xi[..., 0] + 1j * self._xi[..., 1])
        k = self.band.k_ind
        self._proj = np.eye(3)[None] - k[:, :, None] * k[:, None, :] / np.sum(k * k, 1)[:, None, None]
        self._f_local = np.zeros((len(self.band.local), 3), complex)
        self._refresh()
        # calibration state (window [0, t_c] in CALIBRATION_UPDATES intervals)
        self.t_calibrate = None if cfg.calibrate is None else float(cfg.calibrate)
        self.calibrating = self.t_calibrate is not None
        self.updates = 0
        self.iterates = np.full(CALIBRATION_UPDATES, np.nan)
        self._work = 0.0  # integral of P dt over the current interval
        self._span = 0.0
        self.calibrated_at = None
        self.calibration_error = float("nan")
        self._rm_power = []  # per-step power after the spin-up, for the calibration's error
        self.notes = []

    def _refresh(self):
        f_ind = np.einsum("nij,nj->ni", self._proj, self.b)
        self._f_local[...] = self.band.expand(f_ind)

    def target_dissipation(self):
        if self.eps_target is not None:
            return self.eps_target
        return 4.0 * self.band.n_full * self.sigma2 * self.T

    def _work_rate(self, uh):
        v = self.band.gather(uh)
        w = self.band.weight_local[:, None]
        return float(np.sum(w * (np.conj(self._f_local) * v).real))

    def begin_step(self, sim, dt):
        self._p0 = self.layout.sum(self._work_rate(sim.uh))

    def add_to_rhs(self, rhs, weight):
        b = self.band
        for c in range(3):
            rhs[c, b.li, b.lj, b.ll] += weight * self._f_local[:, c]

    def end_step(self, sim, dt):
        # trapezoidal mean of f_n . u over the step, f_n held fixed: the work actually done
        p1 = self.layout.sum(self._work_rate(sim.uh))
        self.power = 0.5 * (self._p0 + p1)
        if self.calibrating:
            self._calibration_step(sim.t + dt, dt)
        a = math.exp(-dt / self.T)
        self.rng.standard_normal(out=self._xi)
        self.b *= a
        self.b += np.sqrt(self.sigma2 * (1.0 - a * a)) * (self._xi[..., 0] + 1j * self._xi[..., 1])
        self._refresh()

    # --- calibration ------------------------------------------------------------------------
    def _set_variance(self, sigma2):
        self.b *= math.sqrt(sigma2 / self.sigma2)
        self.sigma2 = sigma2

    def _calibration_step(self, t_end, dt):
        self._work += self.power * dt
        self._span += dt
        if self.updates >= CALIBRATION_SPIN_UP:
            self._rm_power.append(self.power)
        interval = self.t_calibrate / CALIBRATION_UPDATES
        due = (self.updates + 1) * interval
        if t_end < due - 1e-12 * max(1.0, due) and t_end < self.t_calibrate:
            return
        mean_power = self._work / self._span if self._span > 0 else 0.0
        self.updates += 1
        after = self.updates - CALIBRATION_SPIN_UP
        gain = CALIBRATION_SPIN_UP_GAIN if after <= 0 else 1.0 / after
        # a relative step on the arithmetic mismatch: its root is E[P] = eps* itself (a step in
        # log P would find the geometric mean of the interval powers, biased by Jensen)
        factor = 1.0 - gain * (mean_power / self.eps_target - 1.0)
        factor = min(max(factor, 1.0 / CALIBRATION_MAX_FACTOR), CALIBRATION_MAX_FACTOR)
        self._set_variance(self.sigma2 * factor)
        self.iterates[min(self.updates, CALIBRATION_UPDATES) - 1] = self.sigma2
        self._work = self._span = 0.0
        if t_end >= self.t_calibrate - 1e-12 * max(1.0, self.t_calibrate):
            self._finish_calibration(t_end)

    def _finish_calibration(self, t_end):
        done = self.iterates[CALIBRATION_SPIN_UP: self.updates]
        if done.size == 0:  # steps longer than the intervals: few updates in all
            done = self.iterates[: self.updates]
        self._set_variance(float(np.mean(done[len(done) // 2:])))
        self.calibrating = False
        self.calibrated_at = float(t_end)
        blocking, floor, reliable = self._error_parts()
        self.calibration_error = max(blocking, floor) if math.isfinite(blocking) else float("nan")
        caveat = "" if blocking >= floor else (f"; the floor from the forcing time scale, above "
                                               f"the blocking error {100 * blocking:.2g} %")
        if not reliable:
            caveat += "; the blocking found no plateau: the window is short for its power"
        self.notes.append(
            f"forcing calibrated at t={t_end:.6g}: sigma^2 = {self.sigma2:.6g} "
            f"({self.sigma2 / self.sigma2_initial:.4g} x the Eswaran & Pope value for eps* = "
            f"{self.eps_target:g}, uncertain by {100 * self.calibration_error:.2g} %{caveat}), "
            "frozen from now on")

    def _error_parts(self) -> tuple[float, float, bool]:
        """(blocking error, forcing-time floor, blocking reached its plateau), each relative to
        the mean injected power P over the updates after the spin-up. The calibrated variance is
        uncertain by the larger of the two errors (P about proportional to sigma^2 carries it
        over to the variance and to the stationary eps the run will reach). Computed from the
        stored power series, so a restart gives the same answer.

        Blocking (Flyvbjerg & Petersen 1989) of the per-step power sees correlations only up to
        a fraction of the window. The floor assumes the power stays correlated for at least
        T_F/2: at long T_F the forced modes follow b, P ~ sum |b|^2, and for a Gaussian process
        the autocorrelation of the square is the square of the autocorrelation (Isserlis 1918,
        Biometrika 12, 134), exp(-2t/T_F) for OU, whose integral time is T_F/2. With W the
        window after the spin-up and s_P the relative standard deviation of P,

            floor = s_P sqrt(2 (T_F / 2) / W) = s_P sqrt(T_F / W).
        """
        p = np.asarray(self._rm_power, float)
        if p.size < 8 or not np.all(np.isfinite(p)) or p.mean() <= 0:
            return float("nan"), float("nan"), False
        b = block_average(p)
        window = self.t_calibrate * (CALIBRATION_UPDATES - CALIBRATION_SPIN_UP) / CALIBRATION_UPDATES
        floor = float(np.std(p, ddof=1) / p.mean() * math.sqrt(self.T / window))
        return float(b.stderr / p.mean()), floor, bool(b.reliable)

    def _window_mean_power(self) -> float:
        """The mean injected power <f.u> over the window after the spin-up: the dissipation the
        calibration reached there (equal to eps in a stationary state). The stationary eps after
        the window is the report's and sweep's eps row, measured from t = window_end."""
        p = np.asarray(self._rm_power, float)
        return float(p.mean()) if p.size and np.all(np.isfinite(p)) else float("nan")

    def derived(self) -> dict:
        out = {"forcing_variance_eswaran_pope": self.sigma2_initial}
        if self.t_calibrate is not None:
            cal = {"window_start": 0.0, "window_end": self.t_calibrate,
                   "target_dissipation": self.eps_target}
            if self.calibrated_at is None:
                cal["status"] = "in progress"
            else:
                blocking, floor, reliable = self._error_parts()
                cal.update(status="done", window_end=self.calibrated_at, variance=self.sigma2,
                           updates=int(self.updates),
                           factor_over_eswaran_pope=self.sigma2 / self.sigma2_initial,
                           relative_error=self.calibration_error,
                           relative_error_from="blocking" if blocking >= floor else "forcing time scale",
                           relative_error_established=reliable,
                           window_mean_power=self._window_mean_power())
            out["forcing_calibration"] = cal
        return out

    def series(self) -> dict:
        return {"forcing_variance": self.sigma2}

    # --- checkpoint -------------------------------------------------------------------------
    def state(self):
        st = super().state()
        st["b"] = self.b.copy()
        st["rng"] = rng_state_array(self.rng)
        st["sigma2"] = np.float64(self.sigma2)
        st["calibrating"] = np.int8(self.calibrating)
        st["updates"] = np.int64(self.updates)
        st["iterates"] = self.iterates.copy()
        st["work"] = np.float64(self._work)
        st["span"] = np.float64(self._span)
        st["calibrated_at"] = np.float64(np.nan if self.calibrated_at is None else self.calibrated_at)
        st["calibration_error"] = np.float64(self.calibration_error)
        st["rm_power"] = np.asarray(self._rm_power, float)
        return st

    def load_state(self, st):
        super().load_state(st)
        self.b[...] = st["b"]
        restore_rng_state(self.rng, st["rng"])
        self.sigma2 = float(st.get("sigma2", self.sigma2))
        if "calibrating" in st:
            self.calibrating = bool(st["calibrating"])
            self.updates = int(st["updates"])
            self.iterates[...] = st["iterates"]
            self._work, self._span = float(st["work"]), float(st["span"])
            at = float(st["calibrated_at"])
            self.calibrated_at = None if math.isnan(at) else at
            self.calibration_error = float(st["calibration_error"])
            self._rm_power = list(np.asarray(st["rm_power"], float))
        self._refresh()
