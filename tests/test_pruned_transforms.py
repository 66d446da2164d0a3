"""Pruned transforms and truncated transposes (`band_limited`): internal, so they must give
today's results to round-off on every layout. Serial here; slab and pencil (uneven blocks
included) under mpiexec in tests/test_mpi_layout.py. References: numpy.fft and the layouts'
full transforms."""
import numpy as np
import pytest

from eddybox.solver.fluid import fft
from eddybox.solver.fluid.navier_stokes import DEALIASING, NonlinearTerm
from eddybox.solver.fluid.serial_layout import SerialLayout

BANDS = ("two-thirds", "stage-shift")


def _box(n, keep):
    ik = np.abs(np.fft.fftfreq(n, 1.0 / n))
    ikz = np.arange(n // 2 + 1)
    return np.broadcast_to((ik[None, :, None] <= keep) & (ikz[None, None, :] <= keep),
                           (n, n, n // 2 + 1))


@pytest.mark.parametrize("n", [16, 18, 30])
@pytest.mark.parametrize("band", BANDS)
@pytest.mark.parametrize("backend", ["auto", "numpy"])
def test_serial_band_transforms_equal_full_ones(n, band, backend):
    lay = SerialLayout(n, 2 * np.pi, threads=1, backend=backend)
    keep = DEALIASING[band].axis_index(n)
    bt = lay.band_limited(keep)
    assert bt is not lay
    box = _box(n, keep)
    u = np.random.default_rng(n).standard_normal((n, n, n))
    ref = np.fft.rfftn(u)  # numpy.fft reference
    spec, full = fft.empty_complex(lay.spec_shape), fft.empty_complex(lay.spec_shape)
    bt.forward(u.copy(), spec)
    lay.forward(u.copy(), full)
    scale = np.abs(ref).max()
    assert np.abs(spec[box] - ref[box]).max() < 1e-12 * scale
    assert np.abs(spec[box] - full[box]).max() < 1e-12 * scale
    # inverse of a band-limited spectrum (zero outside the box, as dealiased fields are)
    band_spec = np.where(box, ref, 0.0)
    want = np.fft.irfftn(band_spec, s=(n, n, n), axes=(0, 1, 2)) * n**3
    got, got_full = fft.empty_real(lay.phys_shape), fft.empty_real(lay.phys_shape)
    spec[...] = band_spec
    bt.inverse(spec, got)
    full[...] = band_spec
    lay.inverse(full, got_full)
    assert np.abs(got - want).max() < 1e-12 * np.abs(want).max()
    assert np.abs(got - got_full).max() < 1e-12 * np.abs(want).max()


@pytest.mark.parametrize("dealias", ["two-thirds", "phase-shift", "stage-shift"])
def test_nonlinear_term_pruned_equals_full(dealias):
    n = 18
    lay = SerialLayout(n, 2 * np.pi, threads=1)
    nl_p = NonlinearTerm(lay, dealias, seed=4, pruned=True)
    nl_f = NonlinearTerm(lay, dealias, seed=4, pruned=False)
    assert nl_p.pruned and not nl_f.pruned
    for nl in (nl_p, nl_f):
        nl.set_stage_shifts((0.0, 0.25), "test")
        nl.begin_step(3)
    rng = np.random.default_rng(2)
    uh = rng.standard_normal((3,) + lay.spec_shape) + 1j * rng.standard_normal((3,) + lay.spec_shape)
    uh[:, 0, 0, 0] = 0.0
    nl_p.keep_mask_apply(uh)
    from eddybox.solver.fluid import spectral_ops as ops

    ops.project_solenoidal(uh, lay.kx, lay.ky, lay.kz)
    for stage in (0, 1):
        a, b = uh.copy(), uh.copy()
        nl_p.evaluate(a, a, 0.0, 1.0, stage)
        nl_f.evaluate(b, b, 0.0, 1.0, stage)
        assert np.abs(a - b).max() < 1e-12 * np.abs(b).max()
        assert nl_p.umax == pytest.approx(nl_f.umax, rel=1e-12)
