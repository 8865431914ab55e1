"""The invented participants' bodies: proportions, a kinematic skeleton, solids.

Segment lengths are fractions of standing height H after the proportions of
Drillis & Contini ("Body Segment Parameters", New York University, Technical
Report 1166-03, 1966), as reproduced in Winter, "Biomechanics and Motor
Control of Human Movement" (Wiley, 4th ed. 2009), figure 4.1 -- quoted from
memory: upper arm 0.186 H, forearm 0.146 H, hand 0.108 H, thigh 0.245 H,
shank 0.246 H, ankle height 0.039 H, foot length 0.152 H, shoulder height
0.818 H, hip height 0.530 H, chin 0.870 H, eye level 0.936 H. Joint centre
spacings (shoulders 0.215 H, hips 0.105 H) are our estimates.

Body frame: x to the participant's right, y forward, z up (see camera.py).
Rotation matrices store a frame's axes as columns (right, forward, up).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import raster as rs
from .raster import OBJ_PERSON

# Range of motion limits used to clamp the animation, in degrees. Values are
# the usual adult "normal range of motion" figures of clinical handbooks
# (American Academy of Orthopaedic Surgeons, "Joint Motion: Method of
# Measuring and Recording", 1965), quoted from memory and rounded.
JOINT_LIMITS_DEG = {
    "elbow_flexion": (0.0, 145.0),
    "knee_flexion": (0.0, 135.0),
    "hip_flexion": (-10.0, 120.0),
    "trunk_flexion": (-10.0, 75.0),
    "trunk_lateral": (-30.0, 30.0),
    "trunk_rotation": (-40.0, 40.0),
    "neck_flexion": (-30.0, 45.0),
    "neck_rotation": (-70.0, 70.0),
}


def clamp_deg(name: str, value_rad: float) -> float:
    lo, hi = JOINT_LIMITS_DEG[name]
    return float(np.clip(value_rad, np.radians(lo), np.radians(hi)))


def rot_x(a):
    c, s = np.cos(a), np.sin(a)
    return np.array([[1.0, 0, 0], [0, c, -s], [0, s, c]])


def rot_y(a):
    c, s = np.cos(a), np.sin(a)
    return np.array([[c, 0, s], [0, 1.0, 0], [-s, 0, c]])


def rot_z(a):
    c, s = np.cos(a), np.sin(a)
    return np.array([[c, -s, 0], [s, c, 0], [0, 0, 1.0]])


def unit(v):
    v = np.asarray(v, float)
    return v / (np.linalg.norm(v) + 1e-12)


def frame_from_axis(z_axis, hint_x):
    """A rotation whose third column is ``z_axis`` and first is as close to ``hint_x`` as possible."""
    z = unit(z_axis)
    x = np.asarray(hint_x, float) - z * (np.dot(hint_x, z))
    if np.linalg.norm(x) < 1e-6:
        x = np.cross(z, [0.0, 1.0, 0.0]) if abs(z[1]) < 0.9 else np.cross(z, [1.0, 0.0, 0.0])
    x = unit(x)
    y = np.cross(z, x)
    return np.stack([x, y, z], axis=1)


@dataclass(frozen=True)
class BodyShape:
    height: float = 1.70        # standing height H, metres
    arm_scale: float = 1.0      # multiplies arm segment lengths
    leg_scale: float = 1.0      # multiplies leg segment lengths
    girth: float = 1.0          # multiplies limb and trunk radii / depths
    shoulder_scale: float = 1.0
    head_scale: float = 1.0

    @property
    def s(self) -> float:
        return self.height / 1.70

    @property
    def upper_arm(self): return 0.186 * self.height * self.arm_scale
    @property
    def forearm(self): return 0.146 * self.height * self.arm_scale
    @property
    def hand(self): return 0.108 * self.height * self.arm_scale
    @property
    def thigh(self): return 0.245 * self.height * self.leg_scale
    @property
    def shank(self): return 0.246 * self.height * self.leg_scale
    @property
    def ankle_height(self): return 0.039 * self.height
    @property
    def foot(self): return 0.152 * self.height
    @property
    def shoulder_width(self): return 0.215 * self.height * self.shoulder_scale
    @property
    def hip_width(self): return 0.105 * self.height * (0.9 + 0.1 * self.girth)
    @property
    def lumbar(self): return 0.110 * self.height
    @property
    def thoracic(self): return 0.190 * self.height
    @property
    def head_radii(self):
        k = self.height * self.head_scale
        return np.array([0.045 * k, 0.055 * k, 0.066 * k]) * (1.0 + 0.04 * (self.girth - 1.0))

    def to_dict(self) -> dict:
        return {"height_m": round(self.height, 4), "arm_scale": round(self.arm_scale, 4),
                "leg_scale": round(self.leg_scale, 4), "girth": round(self.girth, 4),
                "shoulder_scale": round(self.shoulder_scale, 4),
                "head_scale": round(self.head_scale, 4),
                "upper_arm_m": round(self.upper_arm, 4), "forearm_m": round(self.forearm, 4),
                "thigh_m": round(self.thigh, 4), "shank_m": round(self.shank, 4),
                "shoulder_width_m": round(self.shoulder_width, 4),
                "hip_width_m": round(self.hip_width, 4)}


@dataclass(frozen=True)
class Appearance:
    skin: tuple
    shirt: tuple
    trousers: tuple
    shoes: tuple
    hair: tuple
    hair_style: str = "short"     # short | long | bald
    sleeves: str = "long"         # long | short
    lips: tuple = (0.55, 0.30, 0.30)
    iris: tuple = (0.16, 0.11, 0.08)


@dataclass
class Pose:
    """3-D positions of one body in one frame (world coordinates, metres)."""

    P: np.ndarray                 # pelvis centre (midpoint of the hip joints)
    Qp: np.ndarray                # pelvis frame
    Q1: np.ndarray                # lower trunk frame
    Q2: np.ndarray                # upper trunk frame
    T: np.ndarray                 # top of the lumbar segment
    N: np.ndarray                 # neck base
    Hc: np.ndarray                # head centre
    Qh: np.ndarray                # head frame
    j: dict = field(default_factory=dict)    # named joint centres
    hand_dir: dict = field(default_factory=dict)
    foot_dir: dict = field(default_factory=dict)  # horizontal forward direction of each foot
    palm: dict = field(default_factory=dict)      # direction each palm faces
    angles: dict = field(default_factory=dict)   # joint angles (radians) after clamping


def two_link(root, target, a, b, pole, max_flex_deg=145.0, min_flex_deg=0.0):
    """Planar two-link inverse kinematics: returns (middle joint, end, flexion angle).

    The end is pulled onto the reachable shell if the target is out of reach
    or too close for the flexion limit; the middle joint bends towards ``pole``.
    """
    root = np.asarray(root, float)
    v = np.asarray(target, float) - root
    d = float(np.linalg.norm(v))
    # distance range allowed by the flexion limits (law of cosines)
    d_max = np.sqrt(a * a + b * b + 2 * a * b * np.cos(np.radians(min_flex_deg)))
    d_min = np.sqrt(a * a + b * b + 2 * a * b * np.cos(np.radians(max_flex_deg)))
    d = float(np.clip(d, d_min, d_max * 0.9999))
    u = unit(v)
    cos_r = np.clip((a * a + d * d - b * b) / (2 * a * d), -1.0, 1.0)
    sin_r = np.sqrt(1.0 - cos_r * cos_r)
    p = np.asarray(pole, float)
    perp = p - u * np.dot(p, u)
    if np.linalg.norm(perp) < 1e-9:
        perp = np.cross(u, [1.0, 0.0, 0.0])
    perp = unit(perp)
    mid = root + a * (cos_r * u + sin_r * perp)
    end = root + d * u
    cos_m = np.clip((a * a + b * b - d * d) / (2 * a * b), -1.0, 1.0)
    flex = np.pi - np.arccos(cos_m)
    return mid, end, float(flex)


def trunk(shape: BodyShape, P, yaw, flex, lat, rot, pelvis_tilt=None) -> Pose:
    """Pelvis, spine and shoulders from trunk angles (forward flexion, lateral lean, axial rotation)."""
    flex = clamp_deg("trunk_flexion", flex)
    lat = clamp_deg("trunk_lateral", lat)
    rot = clamp_deg("trunk_rotation", rot)
    if pelvis_tilt is None:
        pelvis_tilt = 0.35 * flex
    Qy = rot_z(yaw)
    Qp = Qy @ rot_z(0.25 * rot) @ rot_x(-pelvis_tilt)
    Q1 = Qy @ rot_z(0.4 * rot) @ rot_y(0.5 * lat) @ rot_x(-0.55 * flex)
    Q2 = Qy @ rot_z(rot) @ rot_y(lat) @ rot_x(-flex)
    P = np.asarray(P, float)
    T = P + Q1 @ np.array([0.0, -0.012 * shape.s, shape.lumbar])
    N = T + Q2 @ np.array([0.0, -0.022 * shape.s, shape.thoracic])
    pose = Pose(P=P, Qp=Qp, Q1=Q1, Q2=Q2, T=T, N=N, Hc=N.copy(), Qh=Q2.copy())
    hw = shape.hip_width / 2
    pose.j["right_hip"] = P + Qp @ np.array([hw, 0.0, 0.0])
    pose.j["left_hip"] = P + Qp @ np.array([-hw, 0.0, 0.0])
    sw = shape.shoulder_width / 2
    for side, sx in (("right", 1.0), ("left", -1.0)):
        pose.j[f"{side}_shoulder"] = T + Q2 @ np.array([sx * sw, -0.005 * shape.s,
                                                        shape.thoracic - 0.018 * shape.height])
    pose.angles.update(trunk_flexion=flex, trunk_lateral=lat, trunk_rotation=rot)
    return pose


def head(shape: BodyShape, pose: Pose, yaw, pitch) -> None:
    """Head centre and frame: ``pitch`` > 0 looks down, ``yaw`` > 0 turns to the left."""
    yaw = clamp_deg("neck_rotation", yaw)
    pitch = clamp_deg("neck_flexion", pitch)
    Qh = pose.Q2 @ rot_z(yaw) @ rot_x(-pitch)
    # the neck bends about its base: head centre sits above and slightly in front of it
    Qn = pose.Q2 @ rot_z(yaw) @ rot_x(-0.6 * pitch)
    pose.Hc = pose.N + Qn @ np.array([0.0, 0.022 * shape.s, 0.094 * shape.height])
    pose.Qh = Qh
    pose.angles.update(neck_rotation=yaw, neck_flexion=pitch)
    hr = shape.head_radii
    # face keypoints on the head surface (head frame: x right, y forward, z up)
    for side, sx in (("right", 1.0), ("left", -1.0)):
        ex, ez = 0.40 * hr[0], 0.10 * hr[2]
        ey = hr[1] * np.sqrt(max(0.0, 1 - (ex / hr[0]) ** 2 - (ez / hr[2]) ** 2))
        pose.j[f"{side}_eye"] = pose.Hc + Qh @ np.array([sx * ex, ey - 0.004 * shape.s, ez])
        ax, az = 0.985 * hr[0], -0.10 * hr[2]
        pose.j[f"{side}_ear"] = pose.Hc + Qh @ np.array([sx * (ax + 0.007 * shape.s), -0.06 * hr[1], az])
    nz = -0.24 * hr[2]
    ny = hr[1] * np.sqrt(1 - (nz / hr[2]) ** 2)
    pose.j["nose"] = pose.Hc + Qh @ np.array([0.0, ny + 0.017 * shape.s, nz])


def arm(shape: BodyShape, pose: Pose, side: str, wrist_target, pole, hand_dir=None,
        palm=None) -> None:
    lo, hi = JOINT_LIMITS_DEG["elbow_flexion"]
    S = pose.j[f"{side}_shoulder"]
    E, W, flex = two_link(S, wrist_target, shape.upper_arm, shape.forearm, pole,
                          max_flex_deg=hi, min_flex_deg=lo + 4.0)
    pose.j[f"{side}_elbow"] = E
    pose.j[f"{side}_wrist"] = W
    fa = unit(W - E)
    if hand_dir is None:
        hand_dir = unit(fa + np.array([0.0, 0.0, -0.25]))
    pose.hand_dir[side] = unit(hand_dir)
    if palm is None:
        # palm down when the hand points forward / sideways, facing the body when it hangs
        sx = 1.0 if side == "right" else -1.0
        hang = max(0.0, -pose.hand_dir[side][2])
        palm = unit(np.array([0.0, 0.0, -1.0]) * (1.0 - hang) + pose.Qp[:, 0] * (-sx) * hang * 1.5)
    pose.palm[side] = palm
    pose.angles[f"{side}_elbow_flexion"] = flex


def leg(shape: BodyShape, pose: Pose, side: str, ankle, pole) -> None:
    lo, hi = JOINT_LIMITS_DEG["knee_flexion"]
    Hj = pose.j[f"{side}_hip"]
    K, A, flex = two_link(Hj, ankle, shape.thigh, shape.shank, pole,
                          max_flex_deg=hi, min_flex_deg=lo + 3.0)
    pose.j[f"{side}_knee"] = K
    pose.j[f"{side}_ankle"] = A
    pose.angles[f"{side}_knee_flexion"] = flex
    th = unit(K - Hj)
    # hip flexion: angle between the thigh and the trunk's downward axis, in the sagittal plane
    down = -pose.Qp[:, 2]
    fwd = pose.Qp[:, 1]
    pose.angles[f"{side}_hip_flexion"] = float(np.arctan2(np.dot(th, fwd), np.dot(th, down)))


# ------------------------------------------------------------------------- solids

# Parts whose surface covers each COCO keypoint. The visibility rule
# (scenario.py) compares the depth drawn at a keypoint's pixel with the
# nearest surface of these parts on the same ray.
OWN_PARTS = {
    # face points: only the feature itself (the rest of the head hides the far eye and ear)
    "nose": ("nose",),
    "left_eye": ("eye_left",), "right_eye": ("eye_right",),
    "left_ear": ("ear_left",), "right_ear": ("ear_right",),
    "left_shoulder": ("deltoid_left", "uarm_left", "yoke_left"),
    "right_shoulder": ("deltoid_right", "uarm_right", "yoke_right"),
    "left_elbow": ("uarm_left", "farm_left"), "right_elbow": ("uarm_right", "farm_right"),
    "left_wrist": ("farm_left", "hand_left"), "right_wrist": ("farm_right", "hand_right"),
    "left_hip": ("hipmass_left", "thigh_left"), "right_hip": ("hipmass_right", "thigh_right"),
    "left_knee": ("thigh_left", "shank_left"), "right_knee": ("thigh_right", "shank_right"),
    "left_ankle": ("shank_left", "foot_left"), "right_ankle": ("shank_right", "foot_right"),
}


def _shade(c, k):
    return tuple(float(np.clip(x * k, 0, 1)) for x in c)


def body_prims(shape: BodyShape, app: Appearance, pose: Pose, affected: str | None = None) -> list:
    """The solids of one body (world coordinates)."""
    s = shape.s
    g = shape.girth
    P = OBJ_PERSON
    out = []
    skin, shirt, trousers, shoes = app.skin, app.shirt, app.trousers, app.shoes
    cone, ell, sph = rs.cone, rs.ellipsoid, rs.sphere
    Qp, Q1, Q2 = pose.Qp, pose.Q1, pose.Q2

    # pelvis and hips (trousers)
    out.append(ell(pose.P + Qp @ np.array([0.0, -0.02 * s, 0.035 * s]), Qp,
                   np.array([0.150 * g, 0.100 * g, 0.105]) * s, trousers, P, "pelvis"))
    for side, sx in (("right", 1.0), ("left", -1.0)):
        hj = pose.j[f"{side}_hip"]
        out.append(ell(hj + Qp @ np.array([sx * 0.022 * s, -0.012 * s, 0.005 * s]), Qp,
                       np.array([0.088 * g, 0.098 * g, 0.105]) * s, trousers, P, f"hipmass_{side}"))
    # trunk (shirt): chest, flanks (straight sides from armpit to waist) and abdomen
    belly = 0.06 * max(0.0, g - 1.0)
    out.append(ell(pose.P + Q1 @ np.array([0.0, 0.010 * s + belly * s, 0.60 * shape.lumbar]), Q1,
                   np.array([0.140 * g, 0.095 * g + belly, 0.13]) * s, shirt, P, "torso"))
    chest_c = pose.T + Q2 @ np.array([0.0, 0.004 * s, 0.56 * shape.thoracic])
    out.append(ell(chest_c, Q2, np.array([0.160 * g * shape.shoulder_scale, 0.100 * g, 0.150]) * s,
                   shirt, P, "torso"))
    for sx in (1.0, -1.0):
        top = pose.T + Q2 @ np.array([sx * 0.105 * g * shape.shoulder_scale * s, -0.004 * s,
                                      0.70 * shape.thoracic])
        bot = pose.P + Q1 @ np.array([sx * 0.098 * g * s, 0.004 * s, 0.45 * shape.lumbar])
        out.append(cone(top, bot, 0.072 * g * s, 0.078 * g * s, shirt, P, "torso"))
    # shoulder yoke: neck base to each shoulder, and the deltoids
    neck_sh = pose.N + Q2 @ np.array([0.0, 0.01 * s, -0.02 * s])
    for side in ("right", "left"):
        S = pose.j[f"{side}_shoulder"]
        out.append(cone(neck_sh, S + Q2 @ np.array([0.0, 0.0, 0.012 * s]), 0.058 * s * g,
                        0.050 * s * g, shirt, P, f"yoke_{side}"))
        out.append(sph(S + Q2 @ np.array([0.0, 0.0, 0.006 * s]), 0.053 * s * g, shirt, P,
                       f"deltoid_{side}"))
    # neck
    Hb = pose.Hc + pose.Qh @ np.array([0.0, -0.012 * s, -0.055 * s])
    out.append(cone(pose.N + Q2 @ np.array([0.0, 0.012 * s, 0.0]), Hb, 0.050 * s * (0.9 + 0.1 * g),
                    0.045 * s, skin, P, "neck"))

    # arms
    for side in ("right", "left"):
        S, E, W = (pose.j[f"{side}_shoulder"], pose.j[f"{side}_elbow"], pose.j[f"{side}_wrist"])
        ru, re, rw = 0.046 * s * g, 0.036 * s * g, 0.026 * s * (0.8 + 0.2 * g)
        if app.sleeves == "long":
            out.append(cone(S, E, ru, re, shirt, P, f"uarm_{side}"))
            out.append(cone(E, W + 0.15 * (E - W), re * 0.98, rw * 1.12, shirt, P, f"farm_{side}"))
            out.append(cone(W + 0.2 * (E - W), W, rw * 1.0, rw * 0.95, skin, P, f"farm_{side}"))
        else:
            M = S + 0.55 * (E - S)
            out.append(cone(S, M, ru * 1.06, ru * 0.98 + 0.004 * s, shirt, P, f"uarm_{side}"))
            out.append(cone(M, E, ru * 0.92, re, skin, P, f"uarm_{side}"))
            out.append(cone(E, W, re * 0.95, rw, skin, P, f"farm_{side}"))
        hd = pose.hand_dir[side]
        fa = unit(W - E)
        # hand: a flattened ellipsoid, width axis across the palm
        palm = pose.palm.get(side, np.array([0.0, 0.0, -1.0]))
        side_axis = np.cross(hd, palm)
        if np.linalg.norm(side_axis) < 1e-3:
            side_axis = np.cross(hd, pose.Qp[:, 1])
        side_axis = unit(side_axis)
        thick = unit(np.cross(side_axis, hd))
        qh = np.stack([side_axis, thick, hd], axis=1)
        hl = shape.hand
        out.append(ell(W + hd * 0.40 * hl, qh, np.array([0.037 * s, 0.017 * s, 0.43 * hl]),
                       skin, P, f"hand_{side}"))
        sx = 1.0 if side == "right" else -1.0
        th0 = W + hd * 0.12 * hl - side_axis * sx * 0.025 * s
        out.append(cone(th0, th0 + unit(hd - side_axis * sx * 0.5) * 0.05 * s, 0.011 * s, 0.009 * s,
                        skin, P, f"hand_{side}"))

    # legs
    for side in ("right", "left"):
        Hj, K, A = pose.j[f"{side}_hip"], pose.j[f"{side}_knee"], pose.j[f"{side}_ankle"]
        out.append(cone(Hj, K, 0.086 * s * g, 0.056 * s * g, trousers, P, f"thigh_{side}"))
        out.append(cone(K, A + 0.10 * (K - A), 0.054 * s * g, 0.037 * s * (0.8 + 0.2 * g), trousers,
                        P, f"shank_{side}"))
        out.append(cone(A + 0.12 * (K - A), A, 0.031 * s, 0.029 * s, _shade(skin, 0.9), P,
                        f"shank_{side}"))
        # calf bulge behind the shank
        sh = unit(A - K)
        qc = frame_from_axis(sh, pose.Qp[:, 0])
        f = pose.Qp[:, 1]
        back = -unit(f - sh * np.dot(f, sh))
        out.append(ell(K + 0.33 * (A - K) + back * 0.012 * s, qc,
                       np.array([0.050 * g, 0.052 * g, 0.13]) * s, trousers, P, f"shank_{side}"))
        # shoe: heel to toe along the foot's forward direction, on the floor
        fwd = pose.foot_dir.get(side, pose.Qp[:, 1])
        fwd = unit(np.array([fwd[0], fwd[1], 0.0]))
        fl = shape.foot
        heel = A + fwd * (-0.22 * fl)
        heel[2] = 0.034 * s
        toe = A + fwd * (0.62 * fl)
        toe[2] = 0.028 * s
        out.append(cone(heel, toe, 0.036 * s, 0.031 * s, shoes, P, f"foot_{side}", shine=0.25))
        out.append(cone(A + np.array([0, 0, -0.022 * s]) - fwd * 0.02 * s,
                        A + fwd * 0.30 * fl + np.array([0, 0, -0.025 * s]),
                        0.035 * s, 0.033 * s, shoes, P, f"foot_{side}", shine=0.25))

    # head
    hr = shape.head_radii
    Qh, Hc = pose.Qh, pose.Hc
    out.append(ell(Hc, Qh, hr, skin, P, "head"))
    hair = app.hair
    if app.hair_style != "bald":
        out.append(ell(Hc + Qh @ np.array([0.0, -0.085 * hr[1], 0.13 * hr[2]]), Qh,
                       hr * np.array([1.06, 1.0, 0.93]), hair, P, "hair", shine=0.15))
        if app.hair_style == "long":
            out.append(ell(Hc + Qh @ np.array([0.0, -0.45 * hr[1], -0.45 * hr[2]]), Qh,
                           hr * np.array([1.02, 0.62, 0.85]), hair, P, "hair", shine=0.15))
    else:
        # a closely cropped fringe around the back of the head
        fringe = tuple(0.5 * h + 0.5 * k for h, k in zip(hair, skin))
        out.append(ell(Hc + Qh @ np.array([0.0, -0.30 * hr[1], -0.18 * hr[2]]), Qh,
                       hr * np.array([1.008, 0.74, 0.50]), fringe, P, "hair"))
    # ears
    for side, sx in (("right", 1.0), ("left", -1.0)):
        ec = Hc + Qh @ np.array([sx * 0.96 * hr[0], -0.06 * hr[1], -0.10 * hr[2]])
        qe = Qh @ rot_z(sx * 0.35)
        out.append(ell(ec, qe, np.array([0.011, 0.020, 0.031]) * s, _shade(app.skin, 0.93), P,
                       f"ear_{side}"))
    # eyes: white, iris, brow
    for side in ("right", "left"):
        e = pose.j[f"{side}_eye"]
        out.append(ell(e - Qh @ np.array([0.0, 0.002 * s, 0.0]), Qh,
                       np.array([0.0125, 0.0055, 0.0068]) * s, (0.86, 0.84, 0.80), P, f"eye_{side}"))
        out.append(sph(e + Qh @ np.array([0.0, 0.0012 * s, 0.0]), 0.0052 * s, app.iris, P,
                       f"eye_{side}", shine=0.6))
        out.append(ell(e + Qh @ np.array([0.0, -0.002 * s, 0.020 * s]), Qh,
                       np.array([0.017, 0.006, 0.0042]) * s, _shade(hair, 0.8), P, "head"))
    # nose: the keypoint is its tip
    nose = pose.j["nose"]
    out.append(ell(nose + Qh @ np.array([0.0, -0.019 * s, 0.012 * s]), Qh @ rot_x(-0.30),
                   np.array([0.0135, 0.0205, 0.029]) * s, _shade(app.skin, 1.02), P, "nose"))
    # mouth
    mz = -0.52 * hr[2]
    my = hr[1] * np.sqrt(1 - (mz / hr[2]) ** 2) * 0.97
    out.append(ell(Hc + Qh @ np.array([0.0, my, mz]), Qh, np.array([0.022, 0.008, 0.0065]) * s,
                   app.lips, P, "head"))
    return out
