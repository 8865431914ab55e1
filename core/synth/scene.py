"""The invented clinic room: walls, floor, window, door, chair, table, cameras, lighting,
and a clinician's arm that sometimes reaches into view.

The room is an axis-aligned box seen from inside; each pixel's ray is
intersected with the six planes in closed form and textured procedurally
(tiles, paint, wood) from noise fields drawn from the clip's own RNG.
"""
from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

from . import body as bd
from . import raster as rs
from .camera import Camera, look_at
from .motion import SEAT_TOP, TABLE_TOP, ramp

ROOM_LO = np.array([-3.3, -2.3, 0.0])
ROOM_HI = np.array([3.3, 3.7, 2.7])


@dataclass(frozen=True)
class Lighting:
    name: str
    light: rs.Light
    exposure: float
    noise: float          # temporal sensor noise sigma, 8-bit units, before gain
    pattern: float = 1.5  # fixed-pattern noise sigma (the same in every frame of a clip)
    gain: float = 1.0
    grey: bool = False
    tint: tuple = (1.0, 1.0, 1.0)   # RGB multipliers (white balance)


LIGHTING = {
    "bright": Lighting("bright", rs.Light(key=0.66, ambient=0.42, sky=0.12), 1.06, 0.9),
    "normal": Lighting("normal", rs.Light(key=0.58, ambient=0.35, sky=0.10), 0.95, 1.1),
    "dim": Lighting("dim", rs.Light(key=0.40, ambient=0.26, sky=0.08), 0.62, 1.6, pattern=2.0,
                    tint=(1.06, 1.0, 0.88)),
    # a monochrome camera in a darkened room: low signal, amplified, so noisy
    "lowlight_grey": Lighting("lowlight_grey", rs.Light(key=0.34, ambient=0.22, sky=0.06), 0.42, 1.3,
                              pattern=2.2, gain=1.9, grey=True),
}


def _noise_field(rng, size, scales=(4, 16, 64), weights=(0.5, 0.3, 0.2)):
    """Smooth value noise in [-1, 1] of shape (size, size), built from upsampled random grids."""
    acc = np.zeros((size, size), np.float32)
    for sc, w in zip(scales, weights):
        g = rng.uniform(-1, 1, (sc + 1, sc + 1)).astype(np.float32)
        acc += w * cv2.resize(g, (size, size), interpolation=cv2.INTER_CUBIC)
    return np.clip(acc, -1, 1)


def _sample(tex, u, v, texel):
    """Nearest-texel lookup with wrap-around; u, v in metres."""
    n = tex.shape[0]
    iu = np.floor(u / texel).astype(np.int64) % n
    iv = np.floor(v / texel).astype(np.int64) % n
    return tex[iv, iu]


@dataclass
class Room:
    wall: tuple
    floor: tuple
    door: tuple
    accent: tuple
    textures: dict
    shadows: list          # (x, y, sx, sy, strength) soft floor shadows


def make_room(rng: np.random.Generator) -> Room:
    walls = [(0.80, 0.84, 0.76), (0.86, 0.82, 0.72), (0.76, 0.81, 0.84), (0.84, 0.80, 0.80)]
    floors = [(0.62, 0.60, 0.56), (0.55, 0.58, 0.60), (0.66, 0.58, 0.48)]
    wall = walls[int(rng.integers(len(walls)))]
    floor = floors[int(rng.integers(len(floors)))]
    door = (0.55, 0.40, 0.26) if rng.uniform() < 0.5 else (0.45, 0.52, 0.60)
    accent = [(0.25, 0.45, 0.55), (0.55, 0.30, 0.30), (0.35, 0.50, 0.35)][int(rng.integers(3))]
    tex = {"fine": rng.uniform(-1, 1, (256, 256)).astype(np.float32),
           "smooth": _noise_field(rng, 256),
           "tile": rng.uniform(-1, 1, (64, 64)).astype(np.float32),
           "grain": _noise_field(rng, 256, scales=(8, 64, 128), weights=(0.3, 0.4, 0.3))}
    return Room(wall, floor, door, accent, tex, [])


def render_room(room: Room, cam: Camera, light: rs.Light):
    """Colour (H, W, 3 float32 RGB), depth (H, W) of the empty room."""
    H, W = cam.height, cam.width
    dx, dy = cam.pixel_rays(np.arange(H), np.arange(W))
    dc = np.stack(np.broadcast_arrays(dx, dy, np.ones((1, 1))), axis=-1)      # (H, W, 3)
    dw = dc @ cam.R          # camera -> world direction (R^T d) for row vectors
    C = cam.centre
    with np.errstate(divide="ignore", invalid="ignore"):
        tb = np.where(dw > 0, (ROOM_HI - C) / dw, (ROOM_LO - C) / dw)
    tb = np.where(np.isfinite(tb) & (tb > 0), tb, np.inf)
    axis = np.argmin(tb, axis=-1)
    t = np.take_along_axis(tb, axis[..., None], -1)[..., 0]
    p = C + dw * t[..., None]
    x, y, z = p[..., 0], p[..., 1], p[..., 2]
    positive = np.take_along_axis(dw, axis[..., None], -1)[..., 0] > 0
    col = np.zeros((H, W, 3), np.float32)
    T = room.textures
    ld = np.asarray(light.direction, float)
    ld /= np.linalg.norm(ld)

    # ---- floor (axis 2, going down)
    fl = (axis == 2) & ~positive
    if fl.any():
        fx, fy = x[fl], y[fl]
        tile = 0.5
        ti = (np.floor(fx / tile).astype(int) % 64, np.floor(fy / tile).astype(int) % 64)
        var = T["tile"][ti[1], ti[0]] * 0.05
        gx = np.abs((fx / tile) - np.round(fx / tile)) * tile
        gy = np.abs((fy / tile) - np.round(fy / tile)) * tile
        grout = (np.minimum(gx, gy) < 0.004).astype(np.float32)
        speck = _sample(T["fine"], fx, fy, 0.006) * 0.035 + _sample(T["smooth"], fx, fy, 0.03) * 0.05
        base = np.asarray(room.floor, np.float32)
        k = (1.0 + var + speck) * (1.0 - 0.28 * grout)
        sh = np.ones_like(fx)
        for (sx_, sy_, ax_, ay_, st) in room.shadows:
            sh *= 1.0 - st * np.exp(-(((fx - sx_) / ax_) ** 2 + ((fy - sy_) / ay_) ** 2))
        lam = light.ambient + light.sky + light.key * max(ld[2], 0.0)
        # a soft pool of light from the window side
        pool = 1.0 + 0.12 * np.exp(-((fx + 1.5) ** 2 + fy ** 2) / 4.0)
        col[fl] = base[None, :] * (k * sh * lam * pool)[:, None]

    # ---- ceiling
    ce = (axis == 2) & positive
    if ce.any():
        cx_, cy_ = x[ce], y[ce]
        panel = ((np.abs((cx_ / 0.6) - np.round(cx_ / 0.6)) < 0.02) |
                 (np.abs((cy_ / 0.6) - np.round(cy_ / 0.6)) < 0.02)).astype(np.float32)
        col[ce] = np.array([0.90, 0.90, 0.88], np.float32) * ((light.ambient + 0.45) *
                                                              (1 - 0.12 * panel))[:, None]

    # ---- walls: axis 0 (x = const) or axis 1 (y = const)
    for ax, pos in ((0, False), (0, True), (1, False), (1, True)):
        m = (axis == ax) & (positive == pos)
        if not m.any():
            continue
        hz = z[m]
        hu = y[m] if ax == 0 else x[m]          # horizontal coordinate along the wall
        n = np.zeros(3)
        n[ax] = -1.0 if pos else 1.0
        lam = light.ambient + light.sky * 0.5 + light.key * max(float(n @ ld), 0.0) * 0.8 + 0.08
        base = np.broadcast_to(np.asarray(room.wall, np.float32), (hz.size, 3)).copy()
        k = 1.0 + _sample(T["smooth"], hu, hz, 0.02) * 0.04 + _sample(T["fine"], hu, hz, 0.004) * 0.015
        k *= 0.86 + 0.14 * np.clip(hz / 2.7, 0, 1)
        # skirting and a handrail
        skirt = hz < 0.10
        base[skirt] = np.array([0.35, 0.33, 0.31], np.float32)
        rail = np.abs(hz - 0.90) < 0.025
        base[rail] = np.asarray(room.accent, np.float32)
        k = np.where(rail, k * (0.85 + 0.3 * (hz - 0.875) / 0.05), k)
        wall_id = (ax, pos)
        if wall_id == (1, False):       # back wall: door and a notice board
            d = (hu > 0.9) & (hu < 1.85) & (hz < 2.08)
            frame = d & ~((hu > 0.96) & (hu < 1.79) & (hz < 2.02))
            wood = _sample(T["grain"], hu * 0.15, hz * 4.0, 0.004) * 0.08
            base[d] = np.asarray(room.door, np.float32)
            k = np.where(d, (1.0 + wood) * 0.95, k)
            base[frame] = np.array([0.90, 0.90, 0.88], np.float32)
            handle = (np.abs(hu - 1.05) < 0.045) & (np.abs(hz - 1.02) < 0.015)
            base[handle] = np.array([0.75, 0.75, 0.72], np.float32)
            board = (hu > -1.6) & (hu < -0.5) & (hz > 1.15) & (hz < 1.85)
            bframe = board & ~((hu > -1.57) & (hu < -0.53) & (hz > 1.18) & (hz < 1.82))
            base[board] = np.array([0.93, 0.93, 0.92], np.float32)
            base[bframe] = np.array([0.45, 0.45, 0.47], np.float32)
            for i, (u0, z0, w0, h0, c) in enumerate([(-1.5, 1.55, 0.3, 0.2, (0.85, 0.6, 0.3)),
                                                     (-1.1, 1.5, 0.45, 0.25, (0.4, 0.6, 0.8)),
                                                     (-1.45, 1.25, 0.7, 0.06, (0.3, 0.3, 0.3))]):
                sheet = (hu > u0) & (hu < u0 + w0) & (hz > z0) & (hz < z0 + h0)
                base[sheet] = np.asarray(c, np.float32)
        elif wall_id == (0, False):     # left wall: a window
            wdw = (hu > -1.0) & (hu < 0.9) & (hz > 0.95) & (hz < 2.15)
            inner = (hu > -0.95) & (hu < 0.85) & (hz > 1.0) & (hz < 2.10)
            bars = inner & ((np.abs(hu + 0.05) < 0.025) | (np.abs(hz - 1.55) < 0.02))
            glass = inner & ~bars
            sky = np.stack([0.78 + 0.1 * (hz[glass] - 1.0), 0.86 + 0.06 * (hz[glass] - 1.0),
                            np.full(glass.sum(), 0.95)], axis=-1).astype(np.float32)
            base[wdw] = np.array([0.92, 0.92, 0.90], np.float32)
            base[glass] = sky
            k = np.where(glass, 1.25 / max(lam, 1e-3) * (light.ambient + light.key) / 0.95, k)
            base[bars] = np.array([0.92, 0.92, 0.90], np.float32)
        elif wall_id == (0, True):      # right wall: cupboard
            cup = (hu > -0.6) & (hu < 0.8) & (hz > 0.10) & (hz < 1.0)
            seam = cup & ((np.abs(hu - 0.1) < 0.006) | (np.abs(hz - 0.96) < 0.006))
            base[cup] = np.array([0.88, 0.87, 0.84], np.float32)
            base[seam] = np.array([0.4, 0.4, 0.4], np.float32)
        col[m] = base * (k * lam)[:, None]
    return col, t


def furniture(exercise: str, table_edge: float | None, rng: np.random.Generator) -> list:
    """Chair (always) and table (reach clips) as boxes and round cones."""
    out = []
    ident = np.eye(3)
    frame = (0.30, 0.31, 0.33)
    seat_c = [(0.22, 0.32, 0.50), (0.45, 0.24, 0.22), (0.24, 0.38, 0.30)][int(rng.integers(3))]
    sy = -0.03
    out.append(rs.box([0.0, sy, SEAT_TOP - 0.03], ident, [0.235, 0.23, 0.03], seat_c, rs.OBJ_CHAIR,
                      "chair"))
    back_q = bd.rot_x(np.radians(8))
    out.append(rs.box([0.0, sy - 0.25, SEAT_TOP + 0.30], back_q, [0.225, 0.025, 0.17], seat_c,
                      rs.OBJ_CHAIR, "chair"))
    for lx in (-0.21, 0.21):
        for ly in (-0.20, 0.20):
            out.append(rs.cone([lx, sy + ly, 0.01], [lx, sy + ly, SEAT_TOP - 0.06], 0.014, 0.014, frame,
                               rs.OBJ_CHAIR, "chair", shine=0.5))
        out.append(rs.cone([lx, sy - 0.22, SEAT_TOP - 0.04], [lx, sy - 0.27, SEAT_TOP + 0.46], 0.013,
                           0.013, frame, rs.OBJ_CHAIR, "chair", shine=0.5))
    if exercise == "reach" and table_edge is not None:
        top = [(0.86, 0.84, 0.80), (0.78, 0.66, 0.50), (0.88, 0.88, 0.88)][int(rng.integers(3))]
        depth = 0.70
        out.append(rs.box([0.0, table_edge + depth / 2, TABLE_TOP - 0.0125], ident,
                          [0.70, depth / 2, 0.0125], top, rs.OBJ_TABLE, "table", shine=0.15))
        out.append(rs.box([0.0, table_edge + 0.02, TABLE_TOP - 0.05], ident, [0.66, 0.012, 0.025],
                          tuple(0.8 * c for c in top), rs.OBJ_TABLE, "table"))
        for lx in (-0.64, 0.64):
            for ly in (0.05, depth - 0.05):
                out.append(rs.cone([lx, table_edge + ly, 0.01], [lx, table_edge + ly, TABLE_TOP - 0.03],
                                   0.022, 0.022, (0.55, 0.56, 0.58), rs.OBJ_TABLE, "table", shine=0.5))
    return out


def floor_shadows(exercise, table_edge, plan) -> list:
    sh = [(0.0, -0.03, 0.32, 0.30, 0.35)]
    if exercise == "reach" and table_edge is not None:
        sh.append((0.0, table_edge + 0.35, 0.85, 0.45, 0.30))
    for side in ("left", "right"):
        a = plan.ankles[side]
        sh.append((a[0], a[1] + 0.03, 0.10, 0.16, 0.35))
    return sh


# -------------------------------------------------------------------------- cameras

VIEW_AZIMUTH = {"front": 0.0, "oblique": 45.0, "side": 90.0}


def make_camera(view: str, side: str, exercise: str, width: int, height: int,
                rng: np.random.Generator, close: bool = False) -> Camera:
    """Cameras around the chair. Azimuth 0 = facing the participant; ``side`` picks left/right."""
    az = np.radians(VIEW_AZIMUTH[view] + rng.uniform(-4, 4)) * (1.0 if side == "right" else -1.0)
    if exercise == "reach":
        dist = {"front": 2.3, "oblique": 2.4, "side": 2.5}[view] + rng.uniform(-0.1, 0.15)
        height_m = {"front": 1.55, "oblique": 1.35, "side": 1.15}[view] + rng.uniform(-0.1, 0.1)
        look = np.array([0.0, 0.20, 0.80])
        hfov = 56.0
        if close:
            dist, height_m, look, hfov = 1.65, 1.55, np.array([0.0, 0.25, 0.97]), 56.0
    else:
        dist = {"front": 3.0, "oblique": 3.0, "side": 2.9}[view] + rng.uniform(-0.1, 0.2)
        height_m = {"front": 1.10, "oblique": 1.45, "side": 0.95}[view] + rng.uniform(-0.1, 0.1)
        look = np.array([0.0, 0.15, 0.82])
        hfov = 60.0
    eye = np.array([np.sin(az) * dist, np.cos(az) * dist, height_m]) + np.array([0.0, look[1], 0.0])
    eye = np.clip(eye, ROOM_LO + 0.15, ROOM_HI - 0.15)
    return look_at(view, eye, look, width=width, height=height, hfov_deg=hfov,
                   principal_offset=(rng.uniform(-3, 3) * width / 640, rng.uniform(-3, 3) * height / 480))


# -------------------------------------------------------------------------- clinician

class ClinicianArm:
    """A clinician's arm that comes into view from the side of the frame and leaves again.

    The clinician stands out of view; their shoulder leans in towards
    ``anchor(t, pose)`` (where the hand goes, e.g. onto a reach target) and
    the arm is solved with two-link inverse kinematics.
    """

    def __init__(self, cam: Camera, anchor, t_in: float, t_out: float, pose0, skin, sleeve,
                 rng: np.random.Generator):
        self.cam = cam
        self.anchor = anchor
        self.t_in, self.t_out = t_in, t_out
        self.skin, self.sleeve = skin, sleeve
        a0 = anchor(0.5 * (t_in + t_out), pose0)
        to_cam = cam.centre - a0
        to_cam[2] = 0.0
        to_cam /= np.linalg.norm(to_cam)
        right = cam.R[0]                       # camera x axis in world coordinates
        uv = cam.project(a0[None])[0]
        sgn = 1.0 if uv[0] > cam.width / 2 else -1.0
        self.direction = bd.unit(right * sgn + to_cam * 0.45 + np.array([0, 0, 0.30]))
        far = a0 + self.direction * 0.6
        for _ in range(40):
            uvs = cam.project(far[None])[0]
            if not (-40 <= uvs[0] < cam.width + 40 and -40 <= uvs[1] < cam.height + 40):
                break
            far = far + self.direction * 0.1
        self.far = far                          # off-screen: where the clinician's body is
        self.lengths = (0.30, 0.28)
        self.reach_time = 0.8 + rng.uniform(0, 0.2)

    def active(self, t):
        return self.t_in <= t <= self.t_out

    def prims(self, t, pose) -> list:
        if not self.active(t):
            return []
        a = ramp(t, self.t_in, self.t_in + self.reach_time) * (1 - ramp(t, self.t_out - self.reach_time,
                                                                          self.t_out))
        tgt = self.anchor(t, pose)
        d = bd.unit(self.far - tgt)
        reach_shoulder = tgt + d * 0.55          # shoulder where the hand just reaches the anchor
        S = self.far + (reach_shoulder - self.far) * a
        # the palm, not the wrist, comes to rest on the anchor
        palm_at = tgt - bd.unit(tgt - S) * 0.075 + np.array([0.0, 0.0, 0.0])
        hand_target = S + (palm_at - S) * min(1.0, 0.25 + 0.75 * a)
        pole = np.array([0.0, 0.0, 0.6]) + d * 0.5
        E, W, _ = bd.two_link(S, hand_target, *self.lengths, pole, max_flex_deg=150, min_flex_deg=5)
        hd = bd.unit(W - E + np.array([0, 0, -0.15]))
        # second pass: put the palm centre (not the wrist) on the path to the anchor
        palm_at = tgt - hd * 0.075
        hand_target = S + (palm_at - S) * min(1.0, 0.25 + 0.75 * a)
        E, W, _ = bd.two_link(S, hand_target, *self.lengths, pole, max_flex_deg=150, min_flex_deg=5)
        hd = bd.unit(W - E + np.array([0, 0, -0.15]))
        out = [rs.cone(S + d * 0.45, S, 0.085, 0.065, self.sleeve, rs.OBJ_CLINICIAN, "clinician"),
               rs.cone(S, E, 0.050, 0.040, self.sleeve, rs.OBJ_CLINICIAN, "clinician"),
               rs.cone(E, W, 0.037, 0.027, self.skin, rs.OBJ_CLINICIAN, "clinician")]
        side_axis = bd.unit(np.cross(hd, [0.0, 0.0, -1.0]))
        thick = bd.unit(np.cross(side_axis, hd))
        out.append(rs.ellipsoid(W + hd * 0.075, np.stack([side_axis, thick, hd], axis=1),
                                np.array([0.038, 0.017, 0.08]), self.skin, rs.OBJ_CLINICIAN,
                                "clinician"))
        return out
