"""Particles across MPI ranks: ghost layers of the velocity field for the interpolation
stencil, and migration of particles that leave their rank's block.

Each rank owns the particles whose cell (floor(x/h) mod N, the rule of
`particles.interpolation.cell_index`) lies in its physical block. Its velocity block is
extended by `order/2` ghost planes on each side of every split axis, filled from the
neighbouring ranks, so every stencil of an owned particle is local.
"""
from __future__ import annotations

import math


def ghost_width(order: int) -> int:
    return order // 2


def _split(n, parts):
    return -(-n // parts)


def ghost_field_bytes(cfg, ranks, layout) -> int:
    """Bytes of the ghosted 3-component velocity block per rank (largest block)."""
    n = cfg["grid"]["points"]
    orders = [s["interpolation"] or cfg["particles"]["interpolation"] for s in cfg["particles"]["sets"]]
    g = ghost_width(max(orders)) if orders else 0
    if layout == "slab":
        return 3 * 8 * (_split(n, ranks) + 2 * g) * n * n
    p1 = int(math.floor(math.sqrt(ranks)))
    while ranks % p1:
        p1 -= 1
    p2 = ranks // p1
    return 3 * 8 * (_split(n, p1) + 2 * g) * (_split(n, p2) + 2 * g) * n
