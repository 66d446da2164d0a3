"""Detected collisions and dispersion of fluid tracers in stationary forced turbulence at 48^3
(the session's shared tracer run, tests/conftest.py `tracers48`: 40000 tracers from t = 4 to 20,
contacts at R = 0.75 eta counted in every step, 4000 of them followed to lags of 6 ~ 3 T_L).

Outside references:
* Saffman & Turner (1956, J. Fluid Mech. 1, 16): the collision kernel of tracers with R below
  eta, sqrt(8 pi / 15) R^3 / tau_eta (Gaussian velocity gradients). Counted ghost collisions of
  tracers agree with it and with the kinematic (spherical) kernel of the same run within a few
  per cent in DNS (Wang, Wexler & Zhou 1998, Phys. Fluids 10, 266; from memory); the velocity
  gradients of real turbulence are not Gaussian, which lowers <|du/dx|> below the Gaussian
  value by a few per cent at this Reynolds number (Pope 2000, sec. 6.5; common practice).
* Taylor (1921, Proc. Lond. Math. Soc. 20, 196): in stationary homogeneous turbulence the
  dispersion per component grows as 2 u'^2 T_L tau once tau >> T_L (exact).
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from eddybox.particles.collisions import SAFFMAN_TURNER
from eddybox.solver.study.particle_readers import collision_table, lagrangian_average


@pytest.fixture(scope="module")
def contacts(tracers48):
    t = collision_table([tracers48])
    assert len(t) == 1
    return {k: v[0] for k, v in t.columns.items()}


def test_collision_radius_and_counts(contacts):
    assert 0.5 < contacts["radius_eta"] < 1.0  # R between eta/2 and eta at every sample
    assert contacts["collisions"] > 20000 and contacts["samples"] == 160


def test_detected_kernel_of_tracers_equals_saffman_turner(contacts):
    got, err = contacts["detected_norm"], contacts["detected_norm_err"]
    assert abs(got / SAFFMAN_TURNER - 1) < 0.10, (got, err, SAFFMAN_TURNER)
    assert err < 0.02 * got  # the comparison is not limited by the statistics


def test_detected_kernel_equals_the_kinematic_kernel_at_the_same_radius(contacts):
    # the quotient keeps the correlation of the two pooled estimates (same samples)
    assert abs(contacts["ratio"] - 1) < 0.10, (contacts["ratio"], contacts["ratio_err"])
    assert contacts["ratio_err"] < 0.03
    assert abs(contacts["g_contact"] - 1) < 0.02  # tracers do not cluster (incompressible)


def test_taylor_dispersion(tracers48):
    e = lagrangian_average(tracers48, "tracers")
    assert e.lag[-1] == pytest.approx(6.0, abs=0.05)
    assert abs(e.r_l[-1]) < 0.1  # "long time": R_L has (nearly) decayed at the largest lag
    assert 1.0 < e.t_l < 3.0 and math.isfinite(e.t_l_err)
    assert abs(e.taylor_ratio - 1) < 0.10, (e.taylor_ratio, e.taylor_ratio_err, e.t_l, e.u2)
    # tracers move with the fluid: u'^2 of the followed tracers is the flow's (sampling error)
    assert np.isfinite(e.u2) and e.u2 > 0
