"""Exercise timing: seated reach-to-target and sit-to-stand, as smooth keyframed phases.

Every moving quantity goes from keyframe to keyframe along the minimum-jerk
profile 10 s^3 - 15 s^4 + 6 s^5 (Flash & Hogan, "The coordination of arm
movements: an experimentally confirmed mathematical model", Journal of
Neuroscience 5(7), 1985), which has zero velocity and acceleration at both
ends. Hand paths are straight lines in the room with that profile.

Invented patterns, for the demo only (qualitative, after the clinical
literature, no fitted numbers):
- hemiparetic reach: the affected arm is slower, stops short of the target,
  and is made of two overlapping sub-movements (a two-peaked speed profile,
  as described by Rohrer et al., Journal of Neuroscience 22(18), 2002); the
  trunk compensates with extra forward flexion and rotation (Cirstea & Levin,
  Brain 123(5), 2000).
- sit-to-stand phases: trunk flexion, seat-off with the hips moving forward
  then up, extension, standing, and the reverse (Schenkman et al., Physical
  Therapy 70(10), 1990). The hemiparetic participant leans towards the
  unaffected side and holds the affected arm flexed; the participant with a
  walking aid rises more slowly, pushing on a quad stick.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import body as bd
from . import raster as rs
from .body import BodyShape, Pose, unit

SEAT_TOP = 0.46      # chair seat height, metres (a common clinic chair height)
TABLE_TOP = 0.74     # table height
HIP_ABOVE_SEAT = 0.085


def min_jerk(s):
    s = np.clip(s, 0.0, 1.0)
    return s * s * s * (10.0 - 15.0 * s + 6.0 * s * s)


def ramp(t, t0, t1):
    return float(min_jerk((t - t0) / max(t1 - t0, 1e-9)))


class Track:
    """Keyframes (time, value); minimum-jerk between consecutive keys, constant outside."""

    def __init__(self, keys):
        self.keys = sorted(keys, key=lambda k: k[0])

    def __call__(self, t):
        ks = self.keys
        if t <= ks[0][0]:
            return np.asarray(ks[0][1], float)
        for (t0, v0), (t1, v1) in zip(ks, ks[1:]):
            if t <= t1:
                v0, v1 = np.asarray(v0, float), np.asarray(v1, float)
                return v0 + (v1 - v0) * ramp(t, t0, t1)
        return np.asarray(ks[-1][1], float)


def seated_geometry(shape: BodyShape, shank_incline_deg: float, hip_y: float = -0.03):
    """Seated pelvis centre and the ankle y that puts the shank at the given incline.

    Positive incline: ankle ahead of the knee.
    """
    pz = SEAT_TOP + HIP_ABOVE_SEAT * shape.s
    b = np.radians(shank_incline_deg)
    az = shape.ankle_height
    kz = az + shape.shank * np.cos(b)
    dz = pz - kz
    horiz = np.sqrt(max(shape.thigh ** 2 - dz ** 2, 0.01))
    ankle_y = hip_y + horiz + shape.shank * np.sin(b)
    return np.array([0.0, hip_y, pz]), ankle_y


def _lap_wrist(shape, pose: Pose, side):
    """Wrist position for a hand resting on the thigh, and the hand direction."""
    Hj, K = pose.j[f"{side}_hip"], pose.j[f"{side}_knee"]
    th = unit(K - Hj)
    sx = 1.0 if side == "right" else -1.0
    up = unit(np.cross(pose.Qp[:, 0], th)) * 1.0
    if up[2] < 0:
        up = -up
    w = Hj + 0.50 * (K - Hj) + up * (0.086 * shape.s * shape.girth + 0.018 * shape.s)
    w = w - pose.Qp[:, 0] * sx * 0.02 * shape.s
    return w, unit(th + np.array([0.0, 0.0, -0.35]))


def _hang_wrist(shape, pose: Pose, side):
    sx = 1.0 if side == "right" else -1.0
    S = pose.j[f"{side}_shoulder"]
    d = (shape.upper_arm + shape.forearm) * 0.985
    v = unit(pose.Q1 @ np.array([sx * 0.12, 0.08, 0.0]) + np.array([0.0, 0.0, -1.0]))
    return S + v * d, None


@dataclass
class Participant:
    code: str
    shape: BodyShape
    app: bd.Appearance
    affected: str | None = None     # "left" / "right": hemiparetic side
    aid: str | None = None          # "quad_stick" held in aid_hand
    aid_hand: str = "right"


def _side_sign(side):
    return 1.0 if side == "right" else -1.0


class ReachPlan:
    """Seated reach-to-target: two reaches (forward, sideways), each out, hold, back."""

    exercise = "reach"

    def __init__(self, person: Participant, session: int, rng: np.random.Generator,
                 pause: float = 0.0):
        self.person = person
        sh = person.shape
        self.shape = sh
        self.P0, ankle_y = seated_geometry(sh, 4.0 + rng.uniform(-2, 2))
        self.yaw = 0.0
        self.table_edge = 0.30 + 0.03 * (sh.girth - 1.0) + rng.uniform(-0.02, 0.02)
        aw = sh.hip_width / 2 + 0.035 * sh.s
        self.ankles = {"right": np.array([aw + 0.02, ankle_y, sh.ankle_height]),
                       "left": np.array([-aw - 0.02, ankle_y + rng.uniform(-0.04, 0.02), sh.ankle_height])}
        order = [("right", "forward"), ("left", "side")] if session % 2 == 1 else \
                [("left", "forward"), ("right", "side")]
        self.rest_mode = "table" if session % 2 == 1 else "lap"
        self.sway_phase = rng.uniform(0, 2 * np.pi)
        neutral = self._base_pose(0.06, 0.0, 0.0)
        self.rest = {}
        for side in ("right", "left"):
            if self.rest_mode == "table":
                sx = _side_sign(side)
                w = np.array([sx * 0.17 * sh.s, self.table_edge + 0.025, TABLE_TOP + 0.03])
                self.rest[side] = (w, unit(np.array([-sx * 0.25, 1.0, -0.15])))
            else:
                self.rest[side] = _lap_wrist(sh, neutral, side)
        self.targets = []
        self.reaches = []
        t = 0.6 + rng.uniform(0, 0.2)
        for side, kind in order:
            sx = _side_sign(side)
            if kind == "forward":
                tgt = np.array([sx * 0.15 * sh.s, self.table_edge + 0.38 + 0.2 * (sh.arm_scale - 1)
                                + rng.uniform(-0.02, 0.02), TABLE_TOP + 0.045])
            else:
                tgt = np.array([sx * 0.50, self.table_edge + 0.16 + rng.uniform(-0.02, 0.02),
                                TABLE_TOP + 0.045])
            self.targets.append(tgt)
            affected = person.affected == side
            dur = rng.uniform(0.9, 1.1) * (1.6 if affected else 1.0)
            back = rng.uniform(0.9, 1.05) * (1.4 if affected else 1.0)
            hold = rng.uniform(0.35, 0.5)
            # wrist goal: behind the object along the approach direction
            S0 = neutral.j[f"{side}_shoulder"]
            appr = unit(np.array([tgt[0] - S0[0], tgt[1] - S0[1], 0.0]))
            goal = tgt - appr * 0.075 * sh.s + np.array([0.0, 0.0, 0.0])
            rest_w = self.rest[side][0]
            if affected:
                goal = rest_w + 0.78 * (goal - rest_w)
            # trunk flexion needed to bring the shoulder within reach
            reach_len = 0.92 * (sh.upper_arm + sh.forearm)
            flex_need, lat, rot = 0.06, 0.0, 0.0
            lat_goal = sx * (0.10 if kind == "side" else 0.02)
            rot_goal = sx * (0.10 if kind == "forward" else 0.05)   # reaching shoulder forward
            for deg in range(3, 60):
                f = np.radians(deg)
                pz = self._base_pose(f, lat_goal, rot_goal)
                if np.linalg.norm(pz.j[f"{side}_shoulder"] - goal) <= reach_len:
                    flex_need = f
                    break
            else:
                flex_need = np.radians(60)
            if affected:
                flex_need += np.radians(12)
                rot_goal *= 1.8
            self.reaches.append(dict(side=side, kind=kind, t0=t, t1=t + dur, t2=t + dur + hold,
                                     t3=t + dur + hold + back, goal=goal, flex=flex_need,
                                     lat=lat_goal, rot=rot_goal, affected=affected, target=tgt))
            t = t + dur + hold + back + rng.uniform(0.35, 0.55) + (pause if not self.reaches[1:] else 0.0)
        self.duration = t + 0.2

    def _base_pose(self, flex, lat, rot):
        sh = self.shape
        pose = bd.trunk(sh, self.P0, self.yaw, flex, lat, rot)
        for side in ("right", "left"):
            bd.leg(sh, pose, side, self.ankles[side], pose.Qp[:, 1] + np.array([0, 0, 0.2]))
            pose.foot_dir[side] = unit(pose.Qp[:, 1] + pose.Qp[:, 0] * _side_sign(side) * 0.12)
        return pose

    def _bump(self, r, t, lead=0.0, lag=0.1):
        """0 -> 1 during the out movement, 1 during the hold, 1 -> 0 during the return."""
        up = ramp(t, r["t0"] + lag - lead, r["t1"] + lag * 0.5)
        down = ramp(t, r["t2"] - lead, r["t3"])
        return up * (1.0 - down)

    def pose(self, t: float) -> Pose:
        sh = self.shape
        flex, lat, rot = 0.06, 0.0, 0.0
        hyaw, hpitch = 0.0, np.radians(12)
        for r in self.reaches:
            b = self._bump(r, t)
            flex += (r["flex"] - 0.06) * b
            lat += r["lat"] * b
            rot += r["rot"] * b
            g = self._bump(r, t, lead=0.25, lag=0.0)
            S = self.P0 + np.array([0, 0, 0.5])
            v = r["target"] - S
            hyaw += -np.arctan2(v[0], v[1]) * 0.75 * g
            hpitch += np.radians(14) * g
        flex += np.radians(0.6) * np.sin(2 * np.pi * 0.22 * t + self.sway_phase)
        pose = self._base_pose(flex, lat, rot)
        bd.head(sh, pose, hyaw - rot, hpitch - 0.5 * flex)
        for side in ("right", "left"):
            w, hd = self.rest[side]
            sx = _side_sign(side)
            for r in self.reaches:
                if r["side"] != side:
                    continue
                if r["t0"] <= t <= r["t3"] + 1e-9:
                    goal = r["goal"]
                    hd_goal = unit(unit(r["target"] - goal) + np.array([0, 0, -0.35]))
                    if r["affected"]:
                        T = r["t1"] - r["t0"]
                        a = 0.62 * min_jerk((t - r["t0"]) / (0.58 * T)) + \
                            0.38 * min_jerk((t - r["t0"] - 0.45 * T) / (0.55 * T))
                    else:
                        a = ramp(t, r["t0"], r["t1"])
                    a = a * (1.0 - ramp(t, r["t2"], r["t3"]))
                    w = w + (goal - w) * a
                    hd = unit(hd + (hd_goal - hd) * a)
            pole = np.array([sx * 0.7, -0.35, -1.0])
            bd.arm(sh, pose, side, w, pole, hd)
        return pose

    def prop_prims(self, t: float, pose: Pose | None = None) -> list:
        return []

    def static_prims(self) -> list:
        out = []
        colours = [(0.80, 0.18, 0.16), (0.15, 0.35, 0.75)]
        for tgt, col in zip(self.targets, colours):
            base = tgt.copy()
            base[2] = TABLE_TOP + 0.035
            out.append(rs.cone(base, base + np.array([0, 0, 0.05]), 0.034, 0.036, col, rs.OBJ_TARGET,
                               "target", shine=0.3))
        return out

    def describe(self) -> dict:
        return {"reaches": [{"arm": r["side"], "direction": r["kind"],
                             "start_s": round(r["t0"], 3), "end_s": round(r["t3"], 3),
                             "affected_arm": bool(r["affected"]),
                             "target_xyz_m": [round(float(x), 4) for x in r["target"]]}
                            for r in self.reaches],
                "table_edge_y_m": round(self.table_edge, 4), "rest": self.rest_mode}


class SitToStandPlan:
    """Seated -> trunk flexion -> seat-off -> stand -> sit back down."""

    exercise = "sts"

    def __init__(self, person: Participant, session: int, rng: np.random.Generator):
        self.person = person
        sh = person.shape
        self.shape = sh
        self.yaw = 0.0
        self.P0, ankle_y = seated_geometry(sh, -9.0 + rng.uniform(-2, 2), hip_y=-0.01)
        aw = sh.hip_width / 2 + 0.04 * sh.s
        self.ankles = {"right": np.array([aw + 0.02, ankle_y, sh.ankle_height]),
                       "left": np.array([-aw - 0.02, ankle_y, sh.ankle_height])}
        if person.affected:
            self.ankles[person.affected] = self.ankles[person.affected] + np.array([0, 0.06, 0])
        k = 1.0
        if person.affected:
            k = 1.3
        if person.aid:
            k = 1.45
        k *= rng.uniform(0.93, 1.07)
        leg = (sh.thigh + sh.shank) * 0.992
        stand_y = ankle_y - 0.03 * sh.s
        stand_z = sh.ankle_height + np.sqrt(leg ** 2 - (stand_y - ankle_y) ** 2)
        self.stand = np.array([0.0, stand_y, stand_z])
        flex_max = np.radians(rng.uniform(38, 44) + (6 if person.aid else 0) + (4 if person.affected else 0))
        ta = 0.5 + rng.uniform(0, 0.15)
        tso = ta + 0.65 * k              # seat-off
        tst = tso + 1.2 * k              # fully up
        tsd = tst + rng.uniform(0.7, 0.9)   # start sitting down
        tdn = tsd + 1.5 * k              # seated again
        self.times = dict(flex_start=ta, seat_off=tso, standing=tst, sit_start=tsd, seated=tdn)
        f0 = np.radians(5)
        self.flex = Track([(ta, f0), (tso + 0.05 * k, flex_max), (tso + 0.25 * k, flex_max),
                           (tst, np.radians(2)), (tsd, np.radians(2)), (tsd + 0.6 * k, flex_max * 0.85),
                           (tsd + 0.95 * k, flex_max * 0.85), (tdn + 0.3, f0)])
        P0, Ps = self.P0, self.stand
        self.py = Track([(tso - 0.05 * k, P0[1]), (tso + 0.7 * k, Ps[1]), (tsd + 0.35 * k, Ps[1]),
                         (tdn - 0.1 * k, P0[1])])
        self.pz = Track([(tso, P0[2]), (tst - 0.05 * k, Ps[2]), (tsd + 0.15 * k, Ps[2]),
                         (tdn - 0.15 * k, P0[2])])
        self.hang = Track([(tso + 0.25 * k, 0.0), (tst, 1.0), (tsd + 0.4 * k, 1.0), (tdn - 0.35 * k, 0.0)])
        lean = 0.0
        if person.affected:
            lean = -_side_sign(person.affected) * np.radians(7)    # towards the unaffected side
        self.lat = Track([(ta, 0.0), (tso + 0.3 * k, lean), (tsd + 0.9 * k, lean), (tdn, 0.0)])
        self.duration = tdn + 0.6
        if person.aid:
            sx = _side_sign(person.aid_hand)
            self.aid_base = np.array([sx * (sh.hip_width / 2 + 0.27 * sh.s), ankle_y + 0.10, 0.0])
            self.aid_grip_h = 0.50 * sh.height
        self.sway_phase = rng.uniform(0, 2 * np.pi)

    def pose(self, t: float) -> Pose:
        sh = self.shape
        person = self.person
        P = np.array([self.P0[0], float(self.py(t)), float(self.pz(t))])
        flex = float(self.flex(t)) + np.radians(0.5) * np.sin(2 * np.pi * 0.25 * t + self.sway_phase)
        lat = float(self.lat(t))
        pose = bd.trunk(sh, P, self.yaw, flex, lat, 0.0, pelvis_tilt=0.45 * flex)
        for side in ("right", "left"):
            sx = _side_sign(side)
            bd.leg(sh, pose, side, self.ankles[side], pose.Qp[:, 1] + pose.Qp[:, 0] * sx * 0.15)
            pose.foot_dir[side] = unit(pose.Qp[:, 1] * 1.0 + pose.Qp[:, 0] * sx * 0.14)
        # gaze: forward and a little down, more so while flexed
        bd.head(sh, pose, 0.0, np.radians(8) - 0.55 * flex + np.radians(10) * (flex / 0.7))
        h = float(self.hang(t))
        for side in ("right", "left"):
            sx = _side_sign(side)
            if person.aid and side == person.aid_hand:
                grip = self.aid_base + np.array([0.0, 0.0, self.aid_grip_h])
                hd = unit(pose.Qp[:, 1] + np.array([0, 0, -0.2]))
                w = grip - hd * 0.40 * sh.hand
                bd.arm(sh, pose, side, w, np.array([sx * 0.8, -0.6, -0.4]), hd)
                continue
            if person.affected == side:
                # flexed, held close to the trunk
                w = pose.P + pose.Q1 @ np.array([sx * 0.07 * sh.s, 0.20 * sh.s, 0.19 * sh.s])
                hd = unit(pose.Q1 @ np.array([-sx * 0.7, 0.3, -0.4]))
                bd.arm(sh, pose, side, w, pose.Q1 @ np.array([sx * 0.8, -0.3, -0.6]), hd)
                continue
            lw, lhd = _lap_wrist(sh, pose, side)
            hw, _ = _hang_wrist(sh, pose, side)
            w = lw + (hw - lw) * h
            hd = None if h > 0.5 else lhd
            bd.arm(sh, pose, side, w, np.array([sx * 0.6, -0.6, -0.5]), hd)
        return pose

    def prop_prims(self, t: float, pose: Pose | None = None) -> list:
        if not self.person.aid:
            return []
        pose = pose if pose is not None else self.pose(t)
        side = self.person.aid_hand
        W = pose.j[f"{side}_wrist"]
        hd = pose.hand_dir[side]
        grip = W + hd * 0.42 * self.shape.hand
        B = self.aid_base
        metal, dark = (0.62, 0.64, 0.66), (0.08, 0.08, 0.09)
        out = []
        fwd = unit(np.array([hd[0], hd[1], 0.0]))
        top = grip - np.array([0, 0, 0.012]) - fwd * 0.055
        neck = B + np.array([0.0, 0.0, 0.16]) - fwd * 0.03
        out.append(rs.cone(neck, top, 0.011, 0.011, metal, rs.OBJ_AID, "aid", shine=0.6))
        out.append(rs.cone(B + np.array([0, 0, 0.07]), neck, 0.012, 0.011, metal, rs.OBJ_AID, "aid",
                           shine=0.6))
        out.append(rs.cone(top, top + fwd * 0.13, 0.016, 0.016, dark, rs.OBJ_AID, "aid"))
        qb = bd.frame_from_axis([0, 0, 1.0], [1.0, 0, 0])
        out.append(rs.box(B + np.array([0, 0, 0.065]), qb, np.array([0.09, 0.07, 0.012]), metal,
                          rs.OBJ_AID, "aid", shine=0.4))
        for dx in (-0.075, 0.075):
            for dy in (-0.055, 0.055):
                c = B + np.array([dx, dy, 0.0])
                out.append(rs.cone(c + np.array([0, 0, 0.018]), c + np.array([0, 0, 0.06]), 0.014,
                                   0.010, dark, rs.OBJ_AID, "aid"))
        return out

    def static_prims(self) -> list:
        return []

    def describe(self) -> dict:
        return {"phase_times_s": {k: round(v, 3) for k, v in self.times.items()},
                "walking_aid": self.person.aid}

