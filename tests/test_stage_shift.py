"""Stage-shift dealiasing (fluid.dealias: stage-shift): one product per Runge-Kutta stage on
stage-dependent shifted grids, spherical truncation. Checked against published Runge-Kutta
tableaux, energy conservation of the rotational form, an exact 3/2-padded product computed
with numpy.fft, and the 2/3-rule run at the same k_max (the exact ABC and Taylor-Green
solutions are in tests/test_fluid_core.py)."""
import glob
import os

import h5py
import numpy as np
import pytest

from eddybox.solver.errors import ConfigError
from eddybox.solver.fluid import spectral_ops as ops
from eddybox.solver.fluid.navier_stokes import NonlinearTerm, stage_shift_residual
from eddybox.solver.fluid.serial_layout import SerialLayout
from eddybox.solver.fluid.timestepping import RK2, RK4, LowStorageRK3
from eddybox.solver.run.simulation import Simulation

# classical RK4 (Kutta 1901) and Heun's method: Butcher tableaux as printed in Hairer, Norsett
# & Wanner (1993), Solving ODEs I, Table II.1.2 and eq. (II.1.3)
KUTTA_RK4 = ((1 / 6, 1 / 3, 1 / 3, 1 / 6), (0, 1 / 2, 1 / 2, 1),
             ((0, 0, 0, 0), (1 / 2, 0, 0, 0), (0, 1 / 2, 0, 0), (0, 0, 1, 0)))
HEUN = ((1 / 2, 1 / 2), (0, 1), ((0, 0), (1, 0)))


def test_stage_shifts_cancel_single_aliases_for_the_published_tableaux():
    assert np.allclose(RK4.tableau[0], KUTTA_RK4[0]) and np.allclose(RK4.tableau[2], KUTTA_RK4[2])
    assert np.allclose(RK2.tableau[0], HEUN[0]) and np.allclose(RK2.tableau[2], HEUN[2])
    r4 = stage_shift_residual(*KUTTA_RK4, RK4.stage_shifts)
    assert max(r4[:4]) < 1e-15  # first order and the terms linear in the aliases at h^2
    assert r4[4] == pytest.approx(0.5)  # the quadratic remainder that no phases remove
    r2 = stage_shift_residual(*HEUN, RK2.stage_shifts)
    assert r2[0] < 1e-15 and min(r2[1:]) == pytest.approx(0.5)
    # a pattern that ignores the weights does not cancel: all stages on one grid
    assert stage_shift_residual(*KUTTA_RK4, (0, 0, 0, 0))[0] == pytest.approx(1.0)


def test_low_storage_rk3_cannot_cancel_and_is_refused(config_factory):
    # Williamson (1980) 2N coefficients give the effective weights b_3 = B_3,
    # b_2 = B_2 + A_3 B_3, b_1 = B_1 + A_2 b_2 (= 1/6, 3/10, 8/15); with b_3 > 1/2 no phases of
    # modulus one make sum b_i phi_i vanish: |sum| >= 2 b_3 - 1 = 1/15
    A, B = LowStorageRK3.A, LowStorageRK3.B
    b3 = B[2]
    b2 = B[1] + A[2] * b3
    b1 = B[0] + A[1] * b2
    assert np.allclose([b1, b2, b3], [1 / 6, 3 / 10, 8 / 15])
    phases = np.exp(2j * np.pi * np.random.default_rng(0).random((20000, 3)))
    assert np.abs(phases @ np.array([b1, b2, b3])).min() >= 1 / 15 - 1e-12
    assert LowStorageRK3.stage_shifts is None
    with pytest.raises(ConfigError) as err:
        config_factory(fluid={"viscosity": 0.05, "dealias": "stage-shift"},
                       time={"scheme": "rk3", "cfl": 0.5, "end": 0.2})
    msg = str(err.value)
    assert msg.startswith("fluid.dealias:") and "time.scheme 'rk3'" in msg and "rk4, rk2" in msg


def _random_field(lay, nl, seed=1):
    """A random solenoidal field filling every kept mode (the worst case for aliasing)."""
    rng = np.random.default_rng(seed)
    uh = rng.standard_normal((3,) + lay.spec_shape) + 1j * rng.standard_normal((3,) + lay.spec_shape)
    # Hermitian symmetry on the kz = 0 plane, so the field is real
    n = lay.n
    mi = np.mod(-np.fft.fftfreq(n, 1.0 / n).astype(int), n)
    uh[:, :, :, 0] = 0.5 * (uh[:, :, :, 0] + np.conj(uh[:, mi][:, :, mi, 0]))
    ops.project_solenoidal(uh, lay.kx, lay.ky, lay.kz)
    nl.keep_mask_apply(uh)
    return uh / np.sqrt(np.sum(np.abs(uh) ** 2))


def _padded_product(uh, n):
    """P [u x omega] computed without aliasing on a 3N/2 grid (the 3/2 rule; Orszag 1971,
    J. Atmos. Sci. 28, 1074) with numpy.fft, normalised coefficients, all modes of the N grid."""
    m = 3 * n // 2
    k1 = np.fft.fftfreq(n, 1.0 / n)
    kx, ky, kz = np.meshgrid(k1, k1, np.arange(n // 2 + 1), indexing="ij")
    w = np.stack([1j * (ky * uh[2] - kz * uh[1]), 1j * (kz * uh[0] - kx * uh[2]),
                  1j * (kx * uh[1] - ky * uh[0])])
    idx = np.fft.fftfreq(n, 1.0 / n).astype(int)
    sel = np.mod(idx, m)

    def pad(a):
        big = np.zeros(a.shape[:1] + (m, m, m // 2 + 1), complex)
        big[:, sel[:, None], sel[None, :], :n // 2 + 1] = a
        return np.fft.irfftn(big, s=(m, m, m), axes=(1, 2, 3)) * m**3

    prod = np.cross(pad(uh), pad(w), axis=0)
    ph = np.fft.rfftn(prod, axes=(1, 2, 3)) / m**3
    out = ph[:, sel[:, None], sel[None, :], :n // 2 + 1]
    k2 = np.where(kx**2 + ky**2 + kz**2 == 0, 1.0, kx**2 + ky**2 + kz**2)
    d = (kx * out[0] + ky * out[1] + kz * out[2]) / k2
    return np.stack([out[0] - kx * d, out[1] - ky * d, out[2] - kz * d])


@pytest.mark.parametrize("dealias", ["two-thirds", "phase-shift", "stage-shift"])
def test_rotational_form_conserves_energy_at_every_shift(dealias):
    # sum_k u_k* . N_k = <u . (u x omega)> on the (shifted) grid = 0 pointwise, aliased or not,
    # and P u = u: the rotational form conserves energy exactly in pseudo-spectral form (Zang
    # 1991, Appl. Numer. Math. 7, 27; from memory)
    lay = SerialLayout(18, 2 * np.pi, threads=1)
    nl = NonlinearTerm(lay, dealias, seed=3)
    nl.set_stage_shifts(RK4.stage_shifts, "rk4")
    uh = _random_field(lay, nl)
    for step in (0, 7):
        nl.begin_step(step)
        for stage in range(4):
            out = uh.copy()
            nl.evaluate(out, out, 0.0, 1.0, stage)
            w = lay.wz[None, None, None, :]
            transfer = np.sum(w * (np.conj(uh) * out).real)
            scale = np.sum(w * np.abs(uh) * np.abs(out))
            assert abs(transfer) < 1e-13 * scale


def test_products_against_the_three_halves_padded_product():
    n = 18
    lay = SerialLayout(n, 2 * np.pi, threads=1)
    ref_nl = NonlinearTerm(lay, "phase-shift")
    uh = _random_field(lay, ref_nl, seed=5)
    exact = _padded_product(uh, n)
    ref_nl.keep_mask_apply(exact)  # truncated to the sphere |k| < sqrt(2) N/3
    scale = np.abs(exact).max()
    # phase-shift: the average over the grid and the half-cell-shifted grid is exact
    got = uh.copy()
    ref_nl.evaluate(got, got, 0.0, 1.0)
    assert np.abs(got - exact).max() < 1e-12 * scale
    # stage-shift: one product per stage keeps its single aliases, but the stage weights of
    # each scheme cancel them exactly for a common input (sum (0) of stage_shift_residual)
    for scheme in (RK4, RK2):
        nl = NonlinearTerm(lay, "stage-shift", seed=11)
        nl.set_stage_shifts(scheme.stage_shifts, scheme.name)
        nl.begin_step(42)
        weighted = np.zeros_like(uh)
        for stage, b in enumerate(scheme.tableau[0]):
            one = uh.copy()
            nl.evaluate(one, one, 0.0, 1.0, stage)
            assert np.abs(one - exact).max() > 1e-3 * scale  # one stage alone is aliased
            weighted += b * one
        assert np.abs(weighted - exact).max() < 1e-12 * scale


def _one_step(tmp_path, dealias, scheme, h, shifts=None):
    from tests.conftest import make_config

    cfg = make_config(tmp_path / f"{dealias}{scheme}{h}", grid={"points": 16}, seed=3,
                      fluid={"viscosity": 0.02, "dealias": dealias,
                             "initial": {"kind": "spectrum", "energy": 0.5, "peak": 4}},
                      time={"scheme": scheme, "cfl": 1.0, "end": 1.0, "max_dt": h})
    sim = Simulation(cfg, overwrite=True, quiet=True)
    if shifts is not None:
        sim.nl.set_stage_shifts(shifts, "test")
    sim.advance()
    assert sim.dt == h
    return sim.uh


@pytest.mark.parametrize("scheme", ["rk4", "rk2"])
def test_aliasing_left_in_a_step_is_second_order(tmp_path, scheme):
    # the analysis (stage_shift_residual): single aliases cancel at first order, so one step
    # differs from the exactly dealiased step (phase-shift, checked above against the padded
    # product) by O(h^2); all stages on the same grid leave O(h)
    def error(h, shifts=None):
        a = _one_step(tmp_path, "stage-shift", scheme, h, shifts)
        b = _one_step(tmp_path, "phase-shift", scheme, h)
        return np.abs(a - b).max() / np.abs(b).max()

    e1, e2 = error(0.01), error(0.005)
    assert np.log2(e1 / e2) == pytest.approx(2.0, abs=0.3)
    same = (0.0,) * (4 if scheme == "rk4" else 2)
    u1, u2 = error(0.01, same), error(0.005, same)
    assert np.log2(u1 / u2) == pytest.approx(1.0, abs=0.3)
    assert u2 > 20 * e2


def test_shifts_depend_on_seed_and_step_only_so_restarts_are_bitwise(config_factory):
    # beta comes from (seed, step) alone: a run
    # rebuilt at step 5 from the state alone (as after a restart) continues bitwise
    kw = dict(grid={"points": 16}, seed=9,
              fluid={"viscosity": 0.02, "dealias": "stage-shift",
                     "initial": {"kind": "spectrum", "energy": 0.5, "peak": 3}},
              forcing={"kind": "ou", "band": 2.0, "timescale": 0.5, "dissipation": 0.1},
              time={"scheme": "rk4", "cfl": 0.8, "end": 10.0})
    a = Simulation(config_factory(**kw), overwrite=True, quiet=True)
    for _ in range(10):
        a.advance()
    a.close()  # releases the output folder's lock for the next simulation
    b = Simulation(config_factory(**kw), overwrite=True, quiet=True)
    for _ in range(5):
        b.advance()
    b.close()
    c = Simulation(config_factory(**kw), overwrite=True, quiet=True)
    c.uh[...], c.t, c.step, c.dt = b.uh, b.t, b.step, b.dt
    c.forcing.load_state(b.forcing.state())
    for _ in range(5):
        c.advance()
    assert np.array_equal(a.uh, c.uh)


@pytest.fixture(scope="module")
def paired_runs(tmp_path_factory):
    """Forced runs at k_max eta ~ 1.5 from one spun-up 48^3 state, with the same forcing
    sequence (OU, same seed) and the same time steps (max_dt below the CFL step):
    stage-shift and phase-shift at 48^3 (k_max = sqrt(2) 48/3 = 22.63) and the 2/3 rule at
    68^3 (k_max = 68/3 = 22.67)."""
    from tests.conftest import make_config

    tmp = tmp_path_factory.mktemp("paired")
    common = dict(seed=5, forcing={"kind": "ou", "band": 2.0, "timescale": 0.3, "dissipation": 0.1},
                  stats={"fluid": {"every": 0.05}, "spectra": {"every": 0.05}})

    def run(n, dealias, initial, end, name):
        cfg = make_config(tmp / name, grid={"points": n},
                          fluid={"viscosity": 0.0125, "dealias": dealias, "initial": initial},
                          time={"scheme": "rk4", "cfl": 2.5, "max_dt": 0.025, "end": end}, **common)
        sim = Simulation(cfg, overwrite=True, quiet=True)
        assert sim.run() == 0
        return sim.out

    spun = run(48, "stage-shift", {"kind": "spectrum", "energy": 0.4, "peak": 2}, 3.0, "spin")
    start = sorted(glob.glob(os.path.join(spun, "checkpoints", "*.h5")))[-1]
    out = {}
    for n, dealias in ((48, "stage-shift"), (48, "phase-shift"), (68, "two-thirds")):
        path = run(n, dealias, {"kind": "file", "path": start}, 4.0, dealias)
        with h5py.File(os.path.join(path, "fluid.h5")) as f:
            s = {k: f["series"][k][...] for k in ("time", "dt", "dissipation", "re_lambda",
                                                  "skewness", "kmax_eta")}
            s["spectrum"] = f["spectra/energy"][...]
        out[dealias] = s
    return out


def test_forced_48_cube_matches_the_two_thirds_rule_at_the_same_kmax(paired_runs):
    # Compared as time averages over t in [0, 4] (after a spin-up of 3) of paired runs, with
    # error bars by blocking (Flyvbjerg & Petersen 1989) of the paired difference: the common
    # forcing and initial field make the statistical noise of each run cancel in the
    # difference (each run alone has a 2 % error bar on eps over this window).
    from eddybox.solver.estimators.timeseries import block_average

    a, ref, exact = (paired_runs[d] for d in ("stage-shift", "two-thirds", "phase-shift"))
    assert np.array_equal(a["dt"][1:], ref["dt"][1:])  # the same steps: the same forcing
    assert np.mean(a["kmax_eta"]) == pytest.approx(1.5, abs=0.05)
    assert np.mean(a["kmax_eta"]) == pytest.approx(np.mean(ref["kmax_eta"]), rel=0.005)

    def within(x, y, tol=0.02):
        d = block_average(x - y, 0.05)
        return abs(d.mean) + 2 * d.stderr < tol * abs(np.mean(y))

    for key in ("dissipation", "re_lambda", "skewness"):
        assert within(a[key], ref[key]), key
    # the spectrum, shell by shell up to 0.8 k_max; beyond it spherical truncation itself
    # (the exact phase-shift alike, below) holds more energy in the last shells than the
    # 2/3 cube, whose corner modes reach |k| = sqrt(3) k_max (measured: +3 % at 0.84 k_max,
    # +130 % in the last shell)
    kmax = 48 * np.sqrt(2) / 3
    for shell in range(1, int(0.8 * kmax) + 1):
        assert within(a["spectrum"][:, shell], ref["spectrum"][:, shell]), shell
    # against exact dealiasing with the same truncation: every shell within 2 %
    assert np.array_equal(a["dt"], exact["dt"])
    for shell in range(1, int(kmax) + 1):
        assert within(a["spectrum"][:, shell], exact["spectrum"][:, shell]), shell
    for key in ("dissipation", "re_lambda", "skewness"):
        assert within(a[key], exact[key]), key
