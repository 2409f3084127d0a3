"""Benchmarks of ibprep.motion.kinematics against general-purpose peers, measured side by side.

Peers:
* world positions and velocities of many body points at many instants, against the
  same motion built from ``scipy.spatial.transform.Rotation`` (``from_rotvec``,
  composition, ``apply``) with velocities from ``Omega x r`` (one ``apply`` per instant,
  as a caller without a vectorised motion would write it);
* the cycle maximum of the trailing-edge speed (``flow_numbers``), against brute-force
  dense sampling with numpy at the number of samples that reaches the same accuracy.

Run ``python benchmarks/bench_kinematics.py``: prints best-of-N times and ratios.
The classes follow the ``setup`` / ``time_*`` layout of airspeed velocity.
"""

from __future__ import annotations

import math
import sys
import timeit
from pathlib import Path

import numpy as np
from scipy.spatial.transform import Rotation

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from ibprep.motion.kinematics import Motion, flow_numbers  # noqa: E402

__all__ = ["PoseAndVelocity", "CycleMaximum"]


def _motion() -> Motion:
    return Motion(
        frequency=0.25, plunge_amplitude=0.06, pitch_amplitude=math.radians(70), phase=math.pi / 2,
        pivot=(0.02, 0.0, 0.0), roll_amplitude=math.radians(30), roll_root=(0.0, 0.0, 0.0),
    )


class PoseAndVelocity:
    """World positions and velocities of 20 000 points at 64 instants."""

    def setup(self):
        self.mot = _motion()
        self.pts = np.random.default_rng(0).uniform(-0.1, 0.2, (20_000, 3))
        self.t = np.linspace(0.0, self.mot.period, 64, endpoint=False)

    def time_ibprep(self):
        return self.mot.transform(self.pts, self.t), self.mot.velocity(self.pts, self.t)

    def time_scipy_rotation(self):
        mot, pts = self.mot, self.pts
        h, th, ph = mot.plunge(self.t), mot.pitch(self.t), mot.roll(self.t)
        w = mot.angular_frequency
        # rates of the sine waveforms, as a caller would write them by hand
        hd = mot.plunge_amplitude * w * np.cos(w * self.t)
        thd = mot.pitch_amplitude * w * np.cos(w * self.t + mot.phase)
        phd = mot.roll_amplitude * w * np.cos(w * self.t + mot.roll_phase)
        q, p = np.asarray(mot.roll_root), np.asarray(mot.pivot)
        r_pitch = Rotation.from_rotvec(np.outer(-th, [0.0, 0.0, 1.0]))
        r_roll = Rotation.from_rotvec(np.outer(-ph, [1.0, 0.0, 0.0]))
        xs, vs = [], []
        for i in range(self.t.size):
            x = r_pitch[i].apply(r_roll[i].apply(pts - q) + q - p) + p + [0.0, h[i], 0.0]
            om = np.array([0.0, 0.0, -thd[i]]) + r_pitch[i].apply([-phd[i], 0.0, 0.0])
            c = p + [0.0, h[i], 0.0]
            vs.append(np.array([0.0, hd[i], 0.0]) + np.cross(om, x - c)
                      - np.cross(r_pitch[i].apply([-phd[i], 0.0, 0.0]), r_pitch[i].apply(q - p)))
            xs.append(x)
        return np.stack(xs), np.stack(vs)


class CycleMaximum:
    """Peak trailing-edge speed over a cycle (REFERENCES §5.2 layout)."""

    def setup(self):
        self.mot = Motion(frequency=0.14, plunge_amplitude=1.0, pitch_amplitude=math.radians(75),
                          phase=math.pi / 2, pivot=(1 / 3, 0.0, 0.0))
        self.te = np.array([[1.0, 0.0, 0.0]])

    def time_ibprep(self):
        return flow_numbers(self.mot, 1.0, 1.0, 1e-3).max_te_speed

    def time_dense(self, n=200_000):
        t = np.linspace(0.0, self.mot.period, n, endpoint=False)
        return np.linalg.norm(self.mot.velocity(self.te, t)[:, 0], axis=-1).max()


def _best(fn, repeat=5):
    fn()
    return min(timeit.repeat(fn, number=1, repeat=repeat))


def main() -> None:
    b = PoseAndVelocity()
    b.setup()
    x1, v1 = b.time_ibprep()
    x2, v2 = b.time_scipy_rotation()
    err = max(np.abs(x1 - x2).max(), np.abs(v1 - v2).max())
    a, s = _best(b.time_ibprep), _best(b.time_scipy_rotation)
    print(f"pose+velocity 20k pts x 64 t: ibprep {a * 1e3:.1f} ms, scipy Rotation {s * 1e3:.1f} ms, "
          f"ratio scipy/ibprep {s / a:.2f}, max difference {err:.1e}")

    c = CycleMaximum()
    c.setup()
    exact = c.time_ibprep()
    for n in (1_000, 100_000, 1_000_000):
        dense = c.time_dense(n)
        td = _best(lambda: c.time_dense(n), repeat=3)
        ti = _best(c.time_ibprep, repeat=3)
        print(f"cycle max |v_TE|: ibprep {ti * 1e3:.1f} ms; dense {n} samples {td * 1e3:.1f} ms "
              f"(ratio {td / ti:.2f}), dense relative shortfall {(exact - dense) / exact:.1e}")


if __name__ == "__main__":
    main()
