"""Distributed slab and pencil layouts (eddybox.solver.fluid.mpi_layout).

The geometry (ranges, grids, buffer and message sizes) is checked here in-process; the
transforms, reductions and gathers run under `mpiexec -n 2` and `-n 4` (oversubscribed on
small machines) through tests/mpi_scripts/transform_check.py, which compares every layout with
numpy.fft on the global array and reports the measured errors as JSON.
"""
import math
import os

import pytest

from eddybox.solver.errors import ConfigError
from eddybox.solver.fluid.mpi_layout import (
    Decomposition,
    auto_pencil_grid,
    resolve_grid,
    split_range,
    transpose_buffer_points,
    transpose_bytes_sent,
)
from eddybox.solver.run.inventory import local_shapes
from tests.mpi_helpers import cached_results

SCRIPT = os.path.join(os.path.dirname(__file__), "mpi_scripts", "transform_check.py")

CASES = {
    # uneven: 1x2 at N=16 splits 9 kz planes 5 + 4
    2: ["slab:16", "pencil:1x2:16", "pencil:2x1:16", "auto:16", "numpy-slab:16",
        "numpy-pencil:1x2:16"],
    # uneven: slab 18 over 4 (5,5,4,4); 2x2 at 20 (kz 6+5); 1x4 at 18 (y 5,5,4,4; kz 3,3,2,2)
    4: ["slab:16", "slab:18", "pencil:16", "pencil:2x2:20", "pencil:1x4:18",
        "numpy-pencil:2x2:16"],
}


# ---------------------------------------------------------------------------------------------
# geometry, no MPI
# ---------------------------------------------------------------------------------------------
def test_split_range_gives_the_first_ranks_one_more():
    assert split_range(10, 4) == ([3, 3, 2, 2], [0, 3, 6, 8])
    assert split_range(16, 2) == ([8, 8], [0, 8])
    assert split_range(9, 9) == ([1] * 9, list(range(9)))


def test_auto_layout_choice():
    assert resolve_grid(16, 2) == ("slab", (2, 1))
    assert resolve_grid(16, 16) == ("slab", (16, 1))
    assert resolve_grid(16, 32) == ("pencil", (4, 8))     # most nearly square
    assert resolve_grid(16, 128) == ("pencil", (16, 8))   # 8 x 16 would need 16 > 9 kz planes
    assert resolve_grid(16, 2, "pencil") == ("pencil", (1, 2))
    assert resolve_grid(16, 4, "pencil") == ("pencil", (2, 2))
    assert resolve_grid(16, 1) == ("serial", (1, 1))
    assert auto_pencil_grid(16, 17) is None


@pytest.mark.parametrize("n, ranks, kind, grid, words", [
    (16, 17, "slab", None, ["parallel.layout", "slab", "at most 16"]),
    (16, 17, "auto", None, ["parallel.layout", "no process grid", "P2 <= N/2+1 = 9"]),
    (16, 2, "serial", None, ["parallel.layout", "serial", "one rank"]),
    (16, 2, "pencil", [3, 1], ["parallel.grid", "holds 3 ranks", "this run has 2"]),
    (16, 20, "pencil", [1, 20], ["parallel.grid", "P2 = 20", "at most 9"]),
    (16, 34, "pencil", [17, 2], ["parallel.grid", "P1 = 17", "at most N = 16"]),
    (16, 2, "slab", [2, 1], ["parallel.grid", "only used with parallel.layout: pencil"]),
    (16, 2, "pencil", [2.5, 1], ["parallel.grid", "two positive integers"]),
    (16, 2, "cubes", None, ["parallel.layout", "auto, serial, slab, pencil"]),
])
def test_impossible_requests_name_the_key(n, ranks, kind, grid, words):
    with pytest.raises(ConfigError) as err:
        resolve_grid(n, ranks, kind, grid)
    for w in words:
        assert w in str(err.value)


@pytest.mark.parametrize("n", [8, 10])
def test_blocks_tile_the_grid_for_every_allowed_grid(n):
    nh = n // 2 + 1
    for p1 in range(1, n + 1):
        for p2 in range(1, nh + 1):
            phys = [[[0] * n for _ in range(n)] for _ in range(n)]
            spec = [[[0] * nh for _ in range(n)] for _ in range(n)]
            for r in range(p1 * p2):
                g = Decomposition(n, (p1, p2), r)
                assert min(g.phys_shape + g.spec_shape) >= 1
                for i in range(g.phys_start[0], g.phys_start[0] + g.phys_shape[0]):
                    for j in range(g.phys_start[1], g.phys_start[1] + g.phys_shape[1]):
                        phys[i][j][0] += 1
                for j in range(g.spec_start[1], g.spec_start[1] + g.spec_shape[1]):
                    for k in range(g.spec_start[2], g.spec_start[2] + g.spec_shape[2]):
                        spec[0][j][k] += 1
            assert all(phys[i][j][0] == 1 for i in range(n) for j in range(n))
            assert all(spec[0][j][k] == 1 for j in range(n) for k in range(nh))


@pytest.mark.parametrize("n, ranks, kind", [(64, 2, "slab"), (64, 4, "pencil"), (48, 6, "pencil"),
                                            (20, 3, "slab")])
def test_rank0_block_matches_the_memory_inventory(n, ranks, kind):
    _, pg = resolve_grid(n, ranks, kind)
    g = Decomposition(n, pg, 0)
    assert local_shapes(n, ranks, kind) == (math.prod(g.phys_shape), math.prod(g.spec_shape))


@pytest.mark.parametrize("n", [10, 18, 20])
def test_bytes_of_every_rank_at_once_equal_each_ranks_count(n):
    # the closed forms used for thousands of ranks against the per-rank arithmetic of the
    # layout itself, full and truncated transposes, both directions, even and uneven grids
    import numpy as np

    from eddybox.solver.fluid.mpi_layout import bytes_sent_per_rank
    from eddybox.solver.fluid.navier_stokes import DEALIASING

    for p1 in range(1, n + 1, 3):
        for p2 in range(1, n // 2 + 2, 2):
            if p1 * p2 == 1:
                continue
            for keep in (None, DEALIASING["two-thirds"].axis_index(n),
                         DEALIASING["stage-shift"].axis_index(n)):
                for d in ("forward", "inverse"):
                    each = [[Decomposition(n, (p1, p2), p * p2 + q).bytes_sent(d, keep)
                             for q in range(p2)] for p in range(p1)]
                    assert np.array_equal(bytes_sent_per_rank(n, (p1, p2), d, keep), each)


def test_buffers_and_bytes_at_64_cubed_on_two_ranks():
    # hand count, slab 2 x 1: x-slab after the 2-D r2c (32 x 64 x 33), its packed copy, and
    # the ky-slab it is received into (64 x 32 x 33)
    assert transpose_buffer_points(64, 2, "slab") == 3 * 32 * 64 * 33
    # each rank sends the ky half it does not keep: 32 x 32 x 33 complex values of 16 bytes
    assert transpose_bytes_sent(64, 2, "slab") == 32 * 32 * 33 * 16 == 540672
    assert transpose_bytes_sent(64, 2, "slab", direction="inverse") == 540672
    # pencil 1 x 2: the row transpose sends the other rank's kz planes (16 of 33, rank 0)
    assert transpose_bytes_sent(64, 2, "pencil", rank=0) == 64 * 32 * 16 * 16


# ---------------------------------------------------------------------------------------------
# under MPI
# ---------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def results():
    return cached_results(SCRIPT, CASES)


ALL = [(p, c) for p in CASES for c in CASES[p]]


@pytest.mark.parametrize("ranks, case", ALL)
def test_transforms_equal_numpy_fft(results, ranks, case):
    r = results(ranks)["cases"][case]
    # reference: numpy.fft.rfftn / irfftn of the global field, errors relative to the largest
    # value; double-precision FFTs agree to a few ulp times log N (common practice)
    assert r["forward_error"] < 1e-12
    assert r["inverse_error"] < 1e-12
    assert r["roundtrip_error"] < 1e-12


@pytest.mark.parametrize("ranks, case", [(p, c) for p, c in ALL if not c.startswith("numpy-")])
def test_transforms_allocate_no_field_sized_arrays(results, ranks, case):
    pytest.importorskip("pyfftw")
    r = results(ranks)["cases"][case]
    # three forward + inverse pairs after warm-up: only mpi4py's small argument objects
    assert r["transform_peak_alloc"] < r["spec_block_bytes"] / 4


@pytest.mark.parametrize("ranks, case", ALL)
def test_gather_scatter_and_reductions_are_exact(results, ranks, case):
    r = results(ranks)["cases"][case]
    assert r["gather_spectral_exact"] and r["gather_physical_exact"] and r["scatter_exact"]
    assert r["reductions_ok"] and r["bcast_ok"]


@pytest.mark.parametrize("ranks, case", ALL)
def test_local_wavenumbers_concatenate_to_the_serial_ones(results, ranks, case):
    r = results(ranks)["cases"][case]
    assert r["tiling_ok"]
    assert r["wavenumbers_ok"]  # against numpy.fft.fftfreq / rfftfreq and the Hermitian weights


@pytest.mark.parametrize("ranks, case", ALL)
def test_buffers_and_message_sizes(results, ranks, case):
    r = results(ranks)["cases"][case]
    assert r["buffer_bytes_match"] and r["buffer_bytes_max_match"]
    kind, n = case.split(":")[0].replace("numpy-", ""), int(case.split(":")[-1])
    grid = [int(g) for g in case.split(":")[1].split("x")] if case.count(":") == 2 else None
    _, (p1, p2) = resolve_grid(n, ranks, kind, grid)
    nh = n // 2 + 1
    xs, ys, zs = split_range(n, p1)[0], split_range(n, p2)[0], split_range(nh, p2)[0]
    # independent count over all ranks: every value that changes owner in a transpose.
    # Row stage (z -> y whole): rank (p, q) keeps only its own kz planes of its x-y block.
    # Column stage (y -> x whole): rank (p, q) keeps only its own ky rows.
    if p2 == 1:
        moved = sum(nx * (n - nx) * nh for nx in xs)
    else:
        moved = sum(ny * nx * (nh - nz) for nx in xs for ny, nz in zip(ys, zs))
        moved += sum(nx * (n - nx) * nz for nx in xs for nz in zs)
    assert r["bytes_forward"] == r["bytes_inverse"] == 16 * moved


def test_summaries(results):
    c2, c4 = results(2)["cases"], results(4)["cases"]
    assert c2["slab:16"]["summary"] == "slab layout, 16^3 points on 2 ranks, local Fourier block 16x8x9"
    assert c2["pencil:1x2:16"]["summary"] == ("pencil layout 1x2, 16^3 points on 2 ranks, local "
                                              "Fourier block up to 16x16x5")
    assert c4["pencil:16"]["summary"] == ("pencil layout 2x2, 16^3 points on 4 ranks, local "
                                          "Fourier block up to 16x8x5")
    assert c2["auto:16"]["kind"] == "slab" and c4["pencil:16"]["proc_grid"] == [2, 2]


@pytest.mark.parametrize("ranks", [2, 4])
def test_impossible_layouts_fail_on_every_rank_without_hanging(results, ranks):
    errors = results(ranks)["errors"]  # the worker reached its barrier after these
    assert errors
    for e in errors:
        msgs = e["messages"]
        assert len(msgs) == ranks and all(m is not None for m in msgs), e
        assert len(set(msgs)) == 1
        assert msgs[0].startswith(("parallel.layout:", "parallel.grid:"))
    by_case = {tuple(e["case"]): e["messages"][0] for e in errors}
    if ranks == 4:
        # a 1 x 4 grid needs 4 kz planes; at N = 4 only N/2+1 = 3 exist
        assert "P2 = 4" in by_case[("4", "pencil", "[1, 4]")]


# pruned transforms with truncated transposes (band_limited), for the 2/3-rule and spherical
# bands: internal, so they must equal today's transforms to round-off on every layout
BANDS = ("two-thirds", "stage-shift")
ALL_BANDS = [(p, c, b) for p, c in ALL for b in BANDS]


@pytest.mark.parametrize("ranks, case, band", ALL_BANDS)
def test_band_transforms_equal_numpy_and_the_full_transforms(results, ranks, case, band):
    r = results(ranks)["cases"][case]["bands"][band]
    assert r["pruned"]
    for key in ("forward_vs_numpy", "forward_vs_full", "inverse_vs_numpy", "inverse_vs_full",
                "roundtrip"):
        assert r[key] < 1e-12, (key, r[key])


@pytest.mark.parametrize("ranks, case, band", ALL_BANDS)
def test_truncated_transposes_move_what_is_kept_and_add_no_memory(results, ranks, case, band):
    r = results(ranks)["cases"][case]["bands"][band]
    # the layout's arithmetic against a count from the definition (band_check.independent_moved)
    assert r["bytes_forward"] == r["bytes_inverse"] == r["bytes_independent"]
    assert r["bytes_forward"] < r["bytes_full"]
    if band == "two-thirds":
        # a third fewer bytes: the row stage keeps (N/3)/(N/2+1) <= 2/3 of the k_z planes,
        # the column stage (slab: the only one) under 4/9 of the lines
        assert r["bytes_forward"] <= 0.67 * r["bytes_full"]
    assert r["buffers_unchanged"]
    if not case.startswith("numpy-"):
        assert r["peak_alloc"] < r["spec_block_bytes"] / 4
