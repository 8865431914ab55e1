"""Ray-cast rasteriser for round cones, ellipsoids and boxes, with a depth buffer.

Every primitive is intersected analytically with the ray through each pixel
centre of its screen bounding box; a per-pixel depth buffer (Catmull, "A
Subdivision Algorithm for Computer Display of Curved Surfaces", PhD thesis,
University of Utah, 1974) keeps the nearest surface, so depth order is exact
per pixel rather than per primitive (a painter's algorithm would sort whole
solids and get interpenetrating limbs wrong).

Intersections are the textbook quadrics (Glassner (ed.), "An Introduction to
Ray Tracing", Academic Press, 1989): sphere, the cone tangent to two spheres
(a "round cone": a capsule whose radius changes linearly along its axis; a
capsule when both radii are equal, a sphere when its length is zero),
ellipsoid as a unit sphere in scaled local coordinates, box by the slab method
(Kay & Kajiya, SIGGRAPH 1986).

Shading is Lambert's cosine law (Lambert, "Photometria", 1760) for one
directional key light, plus a hemisphere ambient term.

Rays are in camera coordinates from the origin with direction (dx, dy, 1), so
the ray parameter t of a hit is the camera depth z.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .camera import Camera

NEAR = 0.05  # metres; primitives nearer than this to the camera plane are clipped away

# Object classes written to the object-ID buffer.
OBJ_NONE = 0       # room (floor, walls, ceiling)
OBJ_PERSON = 1
OBJ_CHAIR = 2
OBJ_TABLE = 3
OBJ_TARGET = 4
OBJ_AID = 5        # walking aid (quad stick)
OBJ_CLINICIAN = 6
OBJ_NAMES = {OBJ_NONE: "room", OBJ_PERSON: "self", OBJ_CHAIR: "chair", OBJ_TABLE: "table",
             OBJ_TARGET: "target", OBJ_AID: "walking_aid", OBJ_CLINICIAN: "clinician"}


@dataclass
class Prim:
    """One solid. ``kind`` is "cone" (a, b, r1, r2), "ellipsoid" (c, q, r) or "box" (c, q, h).

    ``q`` is a (3, 3) matrix whose columns are the local axes in world
    coordinates; ``r`` / ``h`` the semi-axes / half-extents along them.
    ``part`` names the body part (used for the visibility rule), ``obj`` is
    the object class for the ID buffer.
    """

    kind: str
    colour: tuple
    obj: int
    part: str = ""
    a: np.ndarray | None = None
    b: np.ndarray | None = None
    r1: float = 0.0
    r2: float = 0.0
    c: np.ndarray | None = None
    q: np.ndarray | None = None
    r: np.ndarray | None = None
    shine: float = 0.0           # strength of a Blinn-Phong highlight (shoes, metal)


def cone(a, b, r1, r2, colour, obj, part="", shine=0.0) -> Prim:
    return Prim("cone", tuple(colour), obj, part, a=np.asarray(a, float), b=np.asarray(b, float),
                r1=float(r1), r2=float(r2), shine=shine)


def sphere(c, r, colour, obj, part="", shine=0.0) -> Prim:
    c = np.asarray(c, float)
    return Prim("cone", tuple(colour), obj, part, a=c, b=c, r1=float(r), r2=float(r), shine=shine)


def ellipsoid(c, q, r, colour, obj, part="", shine=0.0) -> Prim:
    return Prim("ellipsoid", tuple(colour), obj, part, c=np.asarray(c, float),
                q=np.asarray(q, float), r=np.asarray(r, float), shine=shine)


def box(c, q, h, colour, obj, part="", shine=0.0) -> Prim:
    return Prim("box", tuple(colour), obj, part, c=np.asarray(c, float),
                q=np.asarray(q, float), r=np.asarray(h, float), shine=shine)


# ----------------------------------------------------------------------------- intersections
# Each function takes ray direction components dx, dy (arrays, dz = 1) and
# primitive parameters already in camera coordinates; returns t (inf on a
# miss) and the unit normal components nx, ny, nz.

def _sphere_hit(dx, dy, c, r):
    dd = dx * dx + dy * dy + 1.0
    b = dx * c[0] + dy * c[1] + c[2]
    cc = c @ c - r * r
    disc = b * b - dd * cc
    ok = disc >= 0.0
    t = np.where(ok, (b - np.sqrt(np.where(ok, disc, 0.0))) / dd, np.inf)
    t = np.where(t > NEAR, t, np.inf)
    return t


def round_cone_hit(dx, dy, a, b, r1, r2):
    """Nearest hit of rays (dx, dy, 1) from the origin with a round cone."""
    axis = b - a
    d = float(np.linalg.norm(axis))
    if d < 1e-9 or abs(r1 - r2) >= d:
        # degenerate: one sphere contains the other
        c, r = (a, r1) if r1 >= r2 else (b, r2)
        t = _sphere_hit(dx, dy, c, r)
        return t, _sphere_normal(dx, dy, t, c, r)
    u = axis / d
    sin_a = (r1 - r2) / d
    cos_a = np.sqrt(1.0 - sin_a * sin_a)
    k = sin_a / cos_a
    rho0 = r1 / cos_a
    s_lo, s_hi = r1 * sin_a, d + r2 * sin_a

    ta = _sphere_hit(dx, dy, a, r1)
    tb = _sphere_hit(dx, dy, b, r2)

    # cone side: |W|^2 - s^2 = (rho0 - k s)^2 with W = tD - a, s = W.u
    dd = dx * dx + dy * dy + 1.0
    du = dx * u[0] + dy * u[1] + u[2]
    s0 = -(a @ u)
    wd = -(dx * a[0] + dy * a[1] + a[2])
    c0 = rho0 - k * s0
    qa = dd - du * du * (1.0 + k * k)
    qb = wd - s0 * du + c0 * k * du
    qc = a @ a - s0 * s0 - c0 * c0
    disc = qb * qb - qa * qc
    good = (disc >= 0.0) & (np.abs(qa) > 1e-12)
    sq = np.sqrt(np.where(good, disc, 0.0))
    qa_safe = np.where(np.abs(qa) > 1e-12, qa, 1.0)
    tc = np.full(np.broadcast(dx, dy).shape, np.inf)
    for sign in (-1.0, 1.0):
        tr = (-qb + sign * sq) / qa_safe
        s = s0 + tr * du
        ok = good & (tr > NEAR) & (s >= s_lo) & (s <= s_hi) & (rho0 - k * s > 0.0)
        tc = np.where(ok & (tr < tc), tr, tc)

    t = np.minimum(np.minimum(ta, tb), tc)
    # normals
    px, py, pz = t * dx, t * dy, t
    fin = np.isfinite(t)
    px, py, pz = np.where(fin, px, 0.0), np.where(fin, py, 0.0), np.where(fin, pz, 0.0)
    nxa, nya, nza = (px - a[0]) / r1, (py - a[1]) / r1, (pz - a[2]) / r1
    nxb, nyb, nzb = (px - b[0]) / max(r2, 1e-9), (py - b[1]) / max(r2, 1e-9), (pz - b[2]) / max(r2, 1e-9)
    wx, wy, wz = px - a[0], py - a[1], pz - a[2]
    s = wx * u[0] + wy * u[1] + wz * u[2]
    rx, ry, rz = wx - s * u[0], wy - s * u[1], wz - s * u[2]
    rn = np.sqrt(rx * rx + ry * ry + rz * rz) + 1e-12
    ncx = rx / rn * cos_a + u[0] * sin_a
    ncy = ry / rn * cos_a + u[1] * sin_a
    ncz = rz / rn * cos_a + u[2] * sin_a
    is_a = t == ta
    is_b = (t == tb) & ~is_a
    nx = np.where(is_a, nxa, np.where(is_b, nxb, ncx))
    ny = np.where(is_a, nya, np.where(is_b, nyb, ncy))
    nz = np.where(is_a, nza, np.where(is_b, nzb, ncz))
    return t, (nx, ny, nz)


def _sphere_normal(dx, dy, t, c, r):
    fin = np.isfinite(t)
    tt = np.where(fin, t, 0.0)
    return ((tt * dx - c[0]) / r, (tt * dy - c[1]) / r, (tt - c[2]) / r)


def ellipsoid_hit(dx, dy, c, q, r):
    """Nearest hit with an ellipsoid (centre c, axes = columns of q, semi-axes r)."""
    m = (q.T / r[:, None])            # world(camera) -> unit-sphere coordinates
    o = -(m @ c)
    ldx = m[0, 0] * dx + m[0, 1] * dy + m[0, 2]
    ldy = m[1, 0] * dx + m[1, 1] * dy + m[1, 2]
    ldz = m[2, 0] * dx + m[2, 1] * dy + m[2, 2]
    qa = ldx * ldx + ldy * ldy + ldz * ldz
    qb = o[0] * ldx + o[1] * ldy + o[2] * ldz
    qc = o @ o - 1.0
    disc = qb * qb - qa * qc
    ok = disc >= 0.0
    t = np.where(ok, (-qb - np.sqrt(np.where(ok, disc, 0.0))) / qa, np.inf)
    t = np.where(t > NEAR, t, np.inf)
    tt = np.where(np.isfinite(t), t, 0.0)
    lx, ly, lz = o[0] + tt * ldx, o[1] + tt * ldy, o[2] + tt * ldz
    # gradient of |M(p - c)|^2 is M^T M (p - c) = M^T p_local
    nx = m[0, 0] * lx + m[1, 0] * ly + m[2, 0] * lz
    ny = m[0, 1] * lx + m[1, 1] * ly + m[2, 1] * lz
    nz = m[0, 2] * lx + m[1, 2] * ly + m[2, 2] * lz
    nn = np.sqrt(nx * nx + ny * ny + nz * nz) + 1e-12
    return t, (nx / nn, ny / nn, nz / nn)


def box_hit(dx, dy, c, q, h):
    """Nearest hit with an oriented box (slab method)."""
    o = -(q.T @ c)
    lds = [q[0, i] * dx + q[1, i] * dy + q[2, i] for i in range(3)]
    tmin = np.full(np.broadcast(dx, dy).shape, -np.inf)
    tmax = np.full_like(tmin, np.inf)
    axis = np.zeros(tmin.shape, dtype=np.int8)
    sgn = np.zeros(tmin.shape)
    with np.errstate(divide="ignore", invalid="ignore"):
        for i in range(3):
            ld = lds[i]
            inv = 1.0 / np.where(np.abs(ld) < 1e-15, 1e-15, ld)
            t1 = (-h[i] - o[i]) * inv
            t2 = (h[i] - o[i]) * inv
            near = np.minimum(t1, t2)
            far = np.maximum(t1, t2)
            upd = near > tmin
            axis = np.where(upd, i, axis)
            sgn = np.where(upd, -np.sign(ld), sgn)
            tmin = np.where(upd, near, tmin)
            tmax = np.minimum(tmax, far)
    hit = (tmax >= tmin) & (tmin > NEAR)
    t = np.where(hit, tmin, np.inf)
    nx = np.zeros(t.shape)
    ny = np.zeros(t.shape)
    nz = np.zeros(t.shape)
    for i in range(3):
        sel = axis == i
        nx = np.where(sel, sgn * q[0, i], nx)
        ny = np.where(sel, sgn * q[1, i], ny)
        nz = np.where(sel, sgn * q[2, i], nz)
    return t, (nx, ny, nz)


# ----------------------------------------------------------------------------- camera space

def to_camera(p: Prim, cam: Camera) -> Prim:
    R, t = cam.R, cam.t
    if p.kind == "cone":
        return Prim("cone", p.colour, p.obj, p.part, a=R @ p.a + t, b=R @ p.b + t,
                    r1=p.r1, r2=p.r2, shine=p.shine)
    return Prim(p.kind, p.colour, p.obj, p.part, c=R @ p.c + t, q=R @ p.q, r=p.r, shine=p.shine)


def _aabb(p: Prim):
    """Axis-aligned bounds (lo, hi) of a camera-space primitive."""
    if p.kind == "cone":
        lo = np.minimum(p.a - p.r1, p.b - p.r2)
        hi = np.maximum(p.a + p.r1, p.b + p.r2)
        return lo, hi
    if p.kind == "ellipsoid":
        ext = np.sqrt(((p.q * p.r[None, :]) ** 2).sum(axis=1))
    else:
        ext = np.abs(p.q * p.r[None, :]).sum(axis=1)
    return p.c - ext, p.c + ext


def screen_box(p: Prim, cam: Camera):
    """Conservative pixel bounds (r0, r1, c0, c1), half-open, or None if off screen."""
    lo, hi = _aabb(p)
    if hi[2] <= NEAR:
        return None
    if lo[2] <= NEAR:
        return 0, cam.height, 0, cam.width
    xs = np.array([lo[0], hi[0]])
    ys = np.array([lo[1], hi[1]])
    zs = np.array([lo[2], hi[2]])
    u = cam.fx * xs[:, None] / zs[None, :] + cam.cx
    v = cam.fy * ys[:, None] / zs[None, :] + cam.cy
    c0 = int(np.floor(u.min())) - 1
    c1 = int(np.ceil(u.max())) + 2
    r0 = int(np.floor(v.min())) - 1
    r1 = int(np.ceil(v.max())) + 2
    c0, c1 = max(c0, 0), min(c1, cam.width)
    r0, r1 = max(r0, 0), min(r1, cam.height)
    if c0 >= c1 or r0 >= r1:
        return None
    return r0, r1, c0, c1


def hit(p: Prim, dx, dy):
    if p.kind == "cone":
        return round_cone_hit(dx, dy, p.a, p.b, p.r1, p.r2)
    if p.kind == "ellipsoid":
        return ellipsoid_hit(dx, dy, p.c, p.q, p.r)
    return box_hit(dx, dy, p.c, p.q, p.r)


@dataclass
class Buffers:
    depth: np.ndarray    # (H, W) float64, camera z of the nearest surface (inf: nothing)
    obj: np.ndarray      # (H, W) int16 object class
    prim: np.ndarray     # (H, W) int32 index into the primitive list (-1: none)
    normal: np.ndarray   # (H, W, 3) float32 camera-space unit normal

    @classmethod
    def empty(cls, h, w):
        return cls(np.full((h, w), np.inf), np.zeros((h, w), np.int16),
                   np.full((h, w), -1, np.int32), np.zeros((h, w, 3), np.float32))

    def copy(self):
        return Buffers(self.depth.copy(), self.obj.copy(), self.prim.copy(), self.normal.copy())


def rasterise(prims: list[Prim], cam: Camera, buf: Buffers, index_offset: int = 0) -> list[Prim]:
    """Draw world-space ``prims`` into ``buf`` with a depth test; returns camera-space copies."""
    cprims = [to_camera(p, cam) for p in prims]
    for i, p in enumerate(cprims):
        sb = screen_box(p, cam)
        if sb is None:
            continue
        r0, r1, c0, c1 = sb
        dx, dy = cam.pixel_rays(np.arange(r0, r1), np.arange(c0, c1))
        dxg = np.broadcast_to(dx, (r1 - r0, c1 - c0))
        dyg = np.broadcast_to(dy, (r1 - r0, c1 - c0))
        t, (nx, ny, nz) = hit(p, dxg, dyg)
        zb = buf.depth[r0:r1, c0:c1]
        win = t < zb
        if not win.any():
            continue
        zb[win] = t[win]
        buf.obj[r0:r1, c0:c1][win] = p.obj
        buf.prim[r0:r1, c0:c1][win] = i + index_offset
        nb = buf.normal[r0:r1, c0:c1]
        nb[..., 0][win] = nx[win]
        nb[..., 1][win] = ny[win]
        nb[..., 2][win] = nz[win]
    return cprims


def first_hit_depth(cprims: list[Prim], cam: Camera, row: int, col: int) -> float:
    """Depth of the nearest of ``cprims`` (camera space) on the ray through one pixel centre."""
    dx, dy = cam.pixel_rays(np.array([row]), np.array([col]))
    best = np.inf
    for p in cprims:
        t, _ = hit(p, dx, dy)
        best = min(best, float(t.ravel()[0]))
    return best


@dataclass(frozen=True)
class Light:
    """Directional key light (world direction *towards* the light) and ambient terms."""

    direction: tuple = (-0.35, 0.45, 0.82)
    key: float = 0.62
    ambient: float = 0.30
    sky: float = 0.12   # extra ambient for normals facing up (hemisphere lighting)


def shade(buf: Buffers, prims_colour: np.ndarray, prims_shine: np.ndarray, cam: Camera,
          light: Light, mask: np.ndarray, out: np.ndarray) -> None:
    """Lambert-shade the pixels in ``mask`` into ``out`` (H, W, 3 float32 RGB, linear 0..1)."""
    if not mask.any():
        return
    idx = buf.prim[mask]
    alb = prims_colour[idx]
    n = buf.normal[mask].astype(np.float64)
    ld = np.asarray(light.direction, float)
    ld = cam.R @ (ld / np.linalg.norm(ld))
    up = cam.R @ np.array([0.0, 0.0, 1.0])
    lam = np.clip(n @ ld, 0.0, None)
    hemi = 0.5 * (1.0 + n @ up)
    # a faint view-facing term so silhouettes read as round (fall-off towards the rim)
    view = np.clip(-n[:, 2], 0.0, 1.0)
    s = light.ambient * (0.75 + 0.25 * view) + light.sky * hemi + light.key * lam
    hv = ld + np.array([0.0, 0.0, -1.0])
    hv /= np.linalg.norm(hv)
    spec = prims_shine[idx] * light.key * np.clip(n @ hv, 0.0, 1.0) ** 20   # Blinn-Phong highlight
    out[mask] = (alb * s[:, None] + spec[:, None]).astype(np.float32)
