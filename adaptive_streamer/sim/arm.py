# SPDX-License-Identifier: Apache-2.0
"""An invented 6-axis arm for the demo cell: kinematics with numpy, vectorised over poses.

The arm (``DEMO_ARM``, joints ``j1``..``j6``) is described by a standard Denavit-Hartenberg
table: joint ``i`` contributes ``Rz(q_i + theta_i) Tz(d_i) Tx(a_i) Rx(alpha_i)`` (Craig /
Spong convention "standard DH", e.g. Spong, Hutchinson & Vidyasagar, Robot Modeling and
Control, 2006, sec. 3.2), followed by a fixed flange-to-nozzle transform. Its numbers are
invented for the demo and describe no real robot:

    joint   a [m]    alpha       d [m]    theta offset
    j1      0.125    -pi/2       0.415    0
    j2      0.545     0          0        -pi/2
    j3      0.095    -pi/2       0        0
    j4      0         pi/2       0.505    0
    j5      0        -pi/2       0        0
    j6      0         0          0.085    0
    nozzle: translation (0.0, 0.025, 0.135) m in the flange frame, same orientation

So: base height 0.415 m, shoulder offset 0.125 m, upper arm 0.545 m, elbow offset 0.095 m,
forearm 0.505 m, flange 0.085 m, and a nozzle 0.135 m out and 25 mm off-axis. At q = 0 the
upper arm is vertical and the forearm points along base +x.

Functions: `ArmKinematics.forward` (homogeneous transforms of the nozzle, (N, 4, 4)),
`ArmKinematics.jacobian` (geometric Jacobian of the nozzle point, base frame, (N, 6, 6):
rows 0-2 linear velocity, rows 3-5 angular velocity) and `ArmKinematics.inverse`
(damped least squares, vectorised over targets).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.spatial.transform import Rotation

JOINTS = ("j1", "j2", "j3", "j4", "j5", "j6")


class KinematicsError(RuntimeError):
    """Bad joint vectors/targets, or an inverse-kinematics solve that did not converge."""


def _dh_transforms(theta: np.ndarray, d: float, a: float, alpha: float) -> np.ndarray:
    """Standard-DH link transforms Rz(theta) Tz(d) Tx(a) Rx(alpha) for theta (N,) -> (N,4,4)."""
    ct, st = np.cos(theta), np.sin(theta)
    ca, sa = np.cos(alpha), np.sin(alpha)
    t = np.zeros(theta.shape + (4, 4))
    t[..., 0, 0], t[..., 0, 1], t[..., 0, 2], t[..., 0, 3] = ct, -st * ca, st * sa, a * ct
    t[..., 1, 0], t[..., 1, 1], t[..., 1, 2], t[..., 1, 3] = st, ct * ca, -ct * sa, a * st
    t[..., 2, 1], t[..., 2, 2], t[..., 2, 3] = sa, ca, d
    t[..., 3, 3] = 1.0
    return t


def _as_batch(q: np.ndarray, n: int) -> tuple[np.ndarray, bool]:
    arr = np.asarray(q, dtype=float)
    single = arr.ndim == 1
    arr = np.atleast_2d(arr)
    if arr.ndim != 2 or arr.shape[1] != n:
        raise KinematicsError(f"joint positions: expected shape ({n},) or (N, {n}), "
                              f"got {np.shape(q)}")
    if not np.all(np.isfinite(arr)):
        raise KinematicsError("joint positions: values must be finite")
    return arr, single


@dataclass(frozen=True, eq=False)
class ArmKinematics:
    """A serial arm given by a standard-DH table (a, alpha, d, theta offset) and a tool."""

    a: tuple[float, ...]
    alpha: tuple[float, ...]
    d: tuple[float, ...]
    theta_offset: tuple[float, ...]
    tool: np.ndarray = field(default_factory=lambda: np.eye(4))
    joints: tuple[str, ...] = JOINTS

    @property
    def n(self) -> int:
        """Number of joints."""
        return len(self.a)

    def frames(self, q: np.ndarray) -> np.ndarray:
        """Base->frame transforms for frames 0..n and the nozzle: (N, n + 2, 4, 4)."""
        qb, _ = _as_batch(q, self.n)
        out = np.empty((qb.shape[0], self.n + 2, 4, 4))
        out[:, 0] = np.eye(4)
        for i in range(self.n):
            link = _dh_transforms(qb[:, i] + self.theta_offset[i], self.d[i], self.a[i],
                                  self.alpha[i])
            out[:, i + 1] = out[:, i] @ link
        out[:, -1] = out[:, -2] @ self.tool
        return out

    def forward(self, q: np.ndarray) -> np.ndarray:
        """Nozzle pose in the base frame: (4, 4) for q (n,), (N, 4, 4) for q (N, n)."""
        qb, single = _as_batch(q, self.n)
        pose = self.frames(qb)[:, -1]
        return pose[0] if single else pose

    def jacobian(self, q: np.ndarray) -> np.ndarray:
        """Geometric Jacobian of the nozzle (revolute joints): (6, n) or (N, 6, n).

        Column i is ``[z_{i-1} x (p_tool - p_{i-1}); z_{i-1}]`` with the joint axes and
        origins in the base frame (Spong et al. 2006, sec. 4.6).
        """
        qb, single = _as_batch(q, self.n)
        f = self.frames(qb)
        z = f[:, :self.n, :3, 2]                          # (N, n, 3) joint axes
        o = f[:, :self.n, :3, 3]                          # (N, n, 3) joint origins
        p = f[:, -1, :3, 3][:, None, :]                   # (N, 1, 3) nozzle point
        jac = np.concatenate([np.cross(z, p - o), z], axis=2).transpose(0, 2, 1)
        return jac[0] if single else jac

    def inverse(self, target: np.ndarray, seed: np.ndarray, damping: float = 1e-3,
                tolerance: float = 1e-10, max_iterations: int = 200) -> np.ndarray:
        """Joint positions reaching nozzle pose(s) ``target`` by damped least squares.

        ``target`` (4, 4) or (N, 4, 4); ``seed`` (n,) or (N, n) starting guesses (the
        solution found is the one the iteration reaches from the seed). Each iteration takes
        ``dq = J^T (J J^T + damping^2 I)^-1 e`` with ``e`` = (position error [m], rotation
        error as a rotation vector [rad]) (damped least squares: Wampler 1986; Nakamura &
        Hanafusa 1986; see Buss, "Introduction to Inverse Kinematics with Jacobian Transpose,
        Pseudoinverse and Damped Least Squares methods", 2004). Raises `KinematicsError`
        naming the first target that has not converged to ``|e| < tolerance``.
        """
        tb = np.asarray(target, dtype=float)
        single = tb.ndim == 2
        tb = tb[None] if single else tb
        if tb.ndim != 3 or tb.shape[1:] != (4, 4) or not np.all(np.isfinite(tb)):
            raise KinematicsError(f"IK target: expected finite (4, 4) or (N, 4, 4), "
                                  f"got shape {np.shape(target)}")
        qs = np.asarray(seed, dtype=float)
        q = np.array(np.broadcast_to(qs, (tb.shape[0], self.n)) if qs.ndim == 1 else qs)
        _as_batch(q, self.n)
        if q.shape[0] != tb.shape[0]:
            raise KinematicsError(f"IK seed: {q.shape[0]} seeds for {tb.shape[0]} targets")
        eye = np.eye(6) * damping ** 2
        err = np.full(tb.shape[0], np.inf)
        for _ in range(max_iterations):
            e = pose_error(tb, self.forward(q))
            err = np.linalg.norm(e, axis=1)
            active = err >= tolerance
            if not active.any():
                break
            j = self.jacobian(q[active])
            jjt = j @ j.transpose(0, 2, 1) + eye
            q[active] += (j.transpose(0, 2, 1)
                          @ np.linalg.solve(jjt, e[active][:, :, None]))[:, :, 0]
        else:
            bad = int(np.argmax(err >= tolerance))
            raise KinematicsError(f"IK did not converge for target {bad} (residual "
                                  f"{err[bad]:.3g} after {max_iterations} iterations); "
                                  "is it within reach, and is the seed close?")
        return q[0] if single else q


def pose_error(target: np.ndarray, actual: np.ndarray) -> np.ndarray:
    """(N, 6) error target - actual: position [m] and rotation vector of R_t R_a^T [rad]."""
    rot = Rotation.from_matrix(target[:, :3, :3] @ actual[:, :3, :3].transpose(0, 2, 1))
    return np.concatenate([target[:, :3, 3] - actual[:, :3, 3], rot.as_rotvec()], axis=1)


def _tool() -> np.ndarray:
    t = np.eye(4)
    t[:3, 3] = (0.0, 0.025, 0.135)
    return t


DEMO_ARM = ArmKinematics(
    a=(0.125, 0.545, 0.095, 0.0, 0.0, 0.0),
    alpha=(-np.pi / 2, 0.0, -np.pi / 2, np.pi / 2, -np.pi / 2, 0.0),
    d=(0.415, 0.0, 0.0, 0.505, 0.0, 0.085),
    theta_offset=(0.0, -np.pi / 2, 0.0, 0.0, 0.0, 0.0),
    tool=_tool(),
)
