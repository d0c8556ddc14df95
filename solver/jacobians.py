"""The Jacobian family derived from the geometric Jacobian: body, spatial, offset point, analytical
(roll-pitch-yaw), the derivative tensor dJ/dq, J_dot, J_dot q_dot and the manipulability gradient
(through the tensor, or in O(n) from the chain structure without forming it).

Input everywhere is the geometric Jacobian of `twistrate.solver.kinematics.geometric_jacobian`:
J : (6, n), base frame, tool point, rows (v, w): linear velocity (m/s) of the tool point, then
angular velocity (rad/s), per unit joint rate (rad/s revolute, m/s prismatic), joint order.
Pure numpy; kernels trust their input (shapes and finiteness are checked at the edges).
"""

from __future__ import annotations

import math

import numpy as np

from twistrate.solver.errors import InputError, field_error
from twistrate.solver.kinematics import LEVI_CIVITA, cross_rows


def _cross_blocks() -> np.ndarray:
    """(3, 36): w (3,) @ result = blockdiag(S(w), S(w)) (6x6, row-major), S(w) @ x = w x x."""
    eps = LEVI_CIVITA.reshape(3, 3, 3)  # eps[r, a, b]: (a x b)_r
    blocks = np.zeros((3, 6, 6))
    for a in range(3):
        blocks[a, :3, :3] = blocks[a, 3:, 3:] = eps[:, a, :]
    out = blocks.reshape(3, 36)
    out.setflags(write=False)
    return out


_CROSS_BLOCKS = _cross_blocks()
#: Smallest product of the singular values for which the manipulability gradient's cofactors
#: prod_{j != r} s_j are formed by division (the smallest normal double): below it the product
#: has lost precision to underflow, or is 0, and the cofactors are multiplied out instead.
COFACTOR_DIVISION_MIN = 2.2250738585072014e-308
_ONES6 = np.ones(6)
_ONES6.setflags(write=False)
#: Row r = 6 i + j of the stacked outer products of two (6, n) arrays X, Y (one outer product
#: X[:, k] Y[:, k]^T per column k, row-major) is X[i] * Y[j]: X.take(_OUTER_I) * Y.take(_OUTER_J).
_OUTER_I = np.repeat(np.arange(6), 6)
_OUTER_J = np.tile(np.arange(6), 6)
_OUTER_I.setflags(write=False)
_OUTER_J.setflags(write=False)

#: Below this |cos(pitch)| the roll-pitch-yaw rates are undefined (det E = cos(pitch)):
#: `analytical_jacobian_rpy` raises InputError and `rpy_from_rotation` takes its gimbal-lock branch.
RPY_SINGULARITY_TOLERANCE = 1e-6


def body_jacobian(J: np.ndarray, T_base_tool: np.ndarray) -> np.ndarray:
    """Body Jacobian J_b = diag(R^T, R^T) J.

    J : (6, n) geometric Jacobian, base frame, tool point, rows (v, w).
    T_base_tool : (4, 4) tool pose in the base frame (R is its rotation block).
    Returns (6, n): velocity of the tool point (m/s) and angular velocity (rad/s), both in tool
    coordinates, rows (v, w).
    """
    R = T_base_tool[:3, :3]
    return (R.T @ J.reshape(2, 3, -1)).reshape(6, -1)


def spatial_jacobian(J: np.ndarray, T_base_tool: np.ndarray) -> np.ndarray:
    """Spatial Jacobian (Murray, Li & Sastry 1994) J_s = [[I, [p_e]x], [0, I]] J.

    J : (6, n) geometric Jacobian, base frame, tool point, rows (v, w).
    T_base_tool : (4, 4) tool pose in the base frame (p_e is its translation, m).
    Returns (6, n), base frame, rows (v, w): v is the velocity of the body-fixed point that is at
    the base origin (m/s), w the angular velocity (rad/s).
    """
    p_e = T_base_tool[:3, 3]
    Js = J.copy()
    Js[:3] -= cross_rows(J[3:].T, np.broadcast_to(p_e, (J.shape[1], 3))).T  # v + p_e x w
    return Js


def offset_point_jacobian(J: np.ndarray, r_base: np.ndarray) -> np.ndarray:
    """Jacobian of a point offset from the tool point: J_p = [[I, -[r]x], [0, I]] J.

    J : (6, n) geometric Jacobian, base frame, tool point, rows (v, w).
    r_base : (3,) offset from the tool point to the point, base frame, m.
    Returns (6, n), base frame, rows (v, w): velocity of the offset point (m/s), angular velocity
    (rad/s).
    """
    Jp = J.copy()
    Jp[:3] += cross_rows(J[3:].T, np.broadcast_to(r_base, (J.shape[1], 3))).T  # v + w x r
    return Jp


def offset_point_jacobian_tool(J: np.ndarray, T_base_tool: np.ndarray, r_tool: np.ndarray) -> np.ndarray:
    """Jacobian of a point fixed to the tool, offset r_tool (3,) m given in tool coordinates.

    J : (6, n) geometric Jacobian, base frame, tool point, rows (v, w).
    T_base_tool : (4, 4) tool pose in the base frame.
    Returns (6, n), base frame, rows (v, w), as `offset_point_jacobian` with r_base = R r_tool.
    """
    return offset_point_jacobian(J, T_base_tool[:3, :3] @ r_tool)


def rpy_from_rotation(R: np.ndarray) -> np.ndarray:
    """Roll-pitch-yaw angles of R = Rz(yaw) Ry(pitch) Rx(roll).

    R : (3, 3) rotation (e.g. the tool orientation in the base frame).
    Returns (3,) [roll, pitch, yaw], rad; pitch in [-pi/2, pi/2], roll and yaw in (-pi, pi].
    Gimbal-lock branch (|cos(pitch)| < RPY_SINGULARITY_TOLERANCE): roll and yaw are not separable;
    yaw is set to 0 and roll carries the whole rotation about the locked axis.
    """
    pitch = np.arctan2(-R[2, 0], np.hypot(R[0, 0], R[1, 0]))
    if np.cos(pitch) < RPY_SINGULARITY_TOLERANCE:
        return np.array([np.arctan2(-R[1, 2], R[1, 1]), pitch, 0.0])
    return np.array([np.arctan2(R[2, 1], R[2, 2]), pitch, np.arctan2(R[1, 0], R[0, 0])])


def rpy_rate_matrix(rpy: np.ndarray) -> np.ndarray:
    """E (3, 3) with w = E @ rpy_dot for R = Rz(yaw) Ry(pitch) Rx(roll).

    rpy : (3,) [roll, pitch, yaw], rad. w: angular velocity, base frame, rad/s.
    E = [[cp cy, -sy, 0], [cp sy, cy, 0], [-sp, 0, 1]], det E = cos(pitch).
    """
    _, p, y = rpy
    cp, sp, cy, sy = np.cos(p), np.sin(p), np.cos(y), np.sin(y)
    return np.array([[cp * cy, -sy, 0.0], [cp * sy, cy, 0.0], [-sp, 0.0, 1.0]])


def analytical_jacobian_rpy(J: np.ndarray, T_base_tool: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Analytical Jacobian with roll-pitch-yaw rates: J_A = diag(I, E^-1) J.

    J : (6, n) geometric Jacobian, base frame, tool point, rows (v, w).
    T_base_tool : (4, 4) tool pose in the base frame.
    Returns (J_A, rpy): J_A (6, n) rows (v m/s, [roll_dot, pitch_dot, yaw_dot] rad/s) per unit
    joint rate; rpy (3,) [roll, pitch, yaw] rad of the tool orientation.
    Raises InputError (field "pitch") at the representation singularity, |cos(pitch)| <
    RPY_SINGULARITY_TOLERANCE (pitch = +-90 deg), where E is not invertible.
    """
    rpy = rpy_from_rotation(T_base_tool[:3, :3])
    _, p, y = rpy
    cp = np.cos(p)
    if cp < RPY_SINGULARITY_TOLERANCE:
        raise field_error(
            InputError, "pitch", f"{p:.9g} rad ({np.degrees(p):.6g} deg)",
            f"|cos(pitch)| >= {RPY_SINGULARITY_TOLERANCE:g}: roll-pitch-yaw rates are undefined at "
            "pitch = +-90 deg (use the geometric Jacobian there)",
        )
    sp, cy, sy = np.sin(p), np.cos(y), np.sin(y)
    E_inv = np.array([[cy / cp, sy / cp, 0.0], [-sy, cy, 0.0], [cy * sp / cp, sy * sp / cp, 1.0]])
    JA = J.copy()
    JA[3:] = E_inv @ J[3:]
    return JA, rpy


def jacobian_derivative(J: np.ndarray) -> np.ndarray:
    """Derivative tensor of the geometric Jacobian (the Hessian of the kinematics).

    J : (6, n) geometric Jacobian, base frame, tool point, rows (v, w); prismatic columns have a
        zero angular part, which is all this needs to know about joint types.
    Returns dJ : (n, 6, n), dJ[j] = dJ/dq_j (6, n), units of J per rad (revolute q_j) or per m
    (prismatic q_j). With column k = (v_k, w_k):
        j <= k: dJ[j][:, k] = (w_j x v_k, w_j x w_k);  j > k: dJ[j][:, k] = (w_k x v_j, 0).
    (Derivation: joint j moves every body distal to it with angular velocity w_j, so distal axes
    and tool-point offsets rotate with w_j; for j > k only the tool point moves, by v_j. This holds
    for revolute and prismatic j and k alike: w = 0 for a prismatic joint.)
    """
    n = J.shape[1]
    # D[j] = blockdiag(S(w_j), S(w_j)) @ J, S(w) the cross-product matrix: D[j][:, k] = (w_j x v_k,
    # w_j x w_k), right for j <= k. The block matrices come from one 2D product with a constant.
    D = (J[3:].T @ _CROSS_BLOCKS).reshape(n, 6, 6) @ J
    idx = np.arange(n)
    lower = idx[:, None, None] > idx  # (n, 1, n): j > k
    # j > k: linear block w_k x v_j = D[k][:3, j] (read from the untouched j <= k part); angular 0.
    Dv = D[:, :3]
    np.copyto(Dv, Dv.transpose(2, 1, 0), where=lower)
    np.copyto(D[:, 3:], 0.0, where=lower)
    return D


def jacobian_dot(J: np.ndarray, qd: np.ndarray, dJ: np.ndarray | None = None) -> np.ndarray:
    """Time derivative J_dot = sum_j dJ/dq_j qd_j of the geometric Jacobian.

    J : (6, n) geometric Jacobian, base frame, tool point, rows (v, w).
    qd : (n,) joint rates, rad/s or m/s.
    dJ : (n, 6, n) from `jacobian_derivative(J)` when already computed, else None.
    Returns (6, n), base frame, rows (v, w), units of J per second.
    """
    if dJ is None:
        dJ = jacobian_derivative(J)
    n = J.shape[1]
    return (qd @ dJ.reshape(n, 6 * n)).reshape(6, n)


def jacobian_dot_qdot(J: np.ndarray, qd: np.ndarray, dJ: np.ndarray | None = None) -> np.ndarray:
    """J_dot @ qd (6,): the velocity-product term of the tool acceleration x_ddot = J qdd + J_dot qd.

    J : (6, n) geometric Jacobian; qd : (n,) joint rates; dJ : (n, 6, n) or None.
    Returns (6,), base frame, rows (linear m/s^2 of the tool point, angular rad/s^2).
    """
    return jacobian_dot(J, qd, dJ) @ qd


def manipulability_gradient(
    J: np.ndarray,
    dJ: np.ndarray | None = None,
    row_weights: np.ndarray | None = None,
    svd: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
) -> np.ndarray:
    """Gradient dw/dq of the manipulability w = product of the singular values of W J (Yoshikawa
    1985); w = sqrt(det(W J J^T W)) for n >= m, sqrt(det(J^T W^2 J)) for n < m.

    J : (m, n) task rows of the geometric Jacobian, base frame, tool point (m = 6: rows (v, w)).
    dJ : (n, m, n) dJ/dq of exactly these rows; None: J must be the full (6, n) geometric Jacobian,
        and the gradient is computed in O(n) from its chain structure without forming dJ/dq
        (`manipulability_gradient_geometric`; through dJ/dq when the row weights differ within
        the linear or the angular block).
    row_weights : (m,) task-row weights W (e.g. [1, 1, 1, L, L, L] with a characteristic length
        L in m, so every row is m/s), or None for W = I.
    svd : (U, s, Vt) of W J when the caller already has it: U (m, m) or (m, k), s (k,) descending,
        Vt (n, n) or (k, n), k = min(m, n) (full or thin np.linalg.svd output); None computes it.
    Returns (n,) dw/dq_i, units of w per rad (or per m for a prismatic joint).

    Formula (Park, Chung & Youm 1999; Yoshikawa 1985): dw/dq_i = sum_r (prod_{j != r} s_j)
    u_r^T W (dJ/dq_i) v_r, with ds_r = u_r^T d(WJ) v_r; with dJ it is evaluated as the inner product
    of dJ/dq_i with dw/dJ = W U diag(c) V^T, c_r = prod_{j != r} s_j.
    It has no division, so it stays finite at and near singular configurations. At an exact
    singularity (s_k = 0) w is not differentiable; the value is then the slope of w along a
    direction that leaves the singularity (its sign follows the SVD's sign choice for the
    vanishing direction, and w grows along both it and its negative); with two or more zero
    singular values the gradient is 0 (w is of second order there).
    """
    if dJ is None:
        if row_weights is None or (row_weights[0] == row_weights[1] == row_weights[2]
                                   and row_weights[3] == row_weights[4] == row_weights[5]):
            weight = None if row_weights is None else np.repeat(row_weights[:, None], J.shape[1], axis=1)
            if svd is None:
                svd = np.linalg.svd(J if weight is None else J * weight, full_matrices=False)
            return manipulability_gradient_geometric(J, svd, weight)
        dJ = jacobian_derivative(J)  # weights differ within a row block: the tensor form
    if svd is None:
        JW = J if row_weights is None else J * row_weights[:, None]
        U, s, Vt = np.linalg.svd(JW, full_matrices=False)
    else:
        U, s, Vt = svd
    k = s.shape[0]
    Uc = U[:, :k] * _cofactors(s)
    if row_weights is not None:
        Uc *= row_weights[:, None]
    n = J.shape[1]
    return dJ.reshape(n, -1) @ (Uc @ Vt[:k]).ravel()


def _cofactors(s: np.ndarray) -> np.ndarray:
    """(k,) c_r = prod_{j != r} s_j for singular values s (k,) >= 0.

    While w = prod s is a finite normal float (>= COFACTOR_DIVISION_MIN) every s_r > 0 and
    c_r = w / s_r is exact to a few roundings. Otherwise (an exactly or nearly singular matrix, whose
    w underflows or is 0; or an overflowing w) from exclusive prefix and suffix products, with no
    division (k <= 6 floats: cheaper in Python than in numpy).
    """
    sv = s.tolist()
    w = math.prod(sv)
    if COFACTOR_DIVISION_MIN <= w < math.inf:
        return w / s
    k = len(sv)
    c = [1.0] * k
    acc = 1.0
    for r in range(k):
        c[r] = acc
        acc *= sv[r]
    acc = 1.0
    for r in range(k - 1, -1, -1):
        c[r] *= acc
        acc *= sv[r]
    return np.array(c)


def manipulability_gradient_geometric(
    J: np.ndarray,
    svd: tuple[np.ndarray, np.ndarray, np.ndarray],
    weight: np.ndarray | None = None,
) -> np.ndarray:
    """O(n) gradient dw/dq of the manipulability w = product of the singular values of the weighted
    Jacobian A = S J D (Yoshikawa 1985; gradient as in Park, Chung & Youm 1999), never forming dJ/dq.

    J : (6, n) geometric Jacobian, base frame, tool point, rows (v, w); revolute and prismatic
        columns alike (a prismatic column has w = 0).
    svd : (U, s, Vt) of A: U (6, 6) or (6, k), s (k,) descending, Vt (n, n) or (k, n), k = min(6, n).
    weight : (6, n) with A = J * weight, weight[r, k] = S_r D_k: S = (alpha, alpha, alpha, beta,
        beta, beta) task-row weights, one per row block (e.g. (1, 1, 1, L, L, L); alpha, beta >= 0,
        zero allowed), D > 0 the
        joint-column weights (e.g. W^-1/2 of weighted least norm). None: A = J. (Different weights
        within a row block break the first identity below: `manipulability_gradient` then uses the
        tensor form.)
    Returns (n,) dw/dq_i, units of w (m^k with S = (1, 1, 1, L, L, L)) per rad (or per m).

    Derivation (independent; checked against the tensor form and finite differences in
    tests/test_jacobians.py). With dA/dq_i = S (dJ/dq_i) D, dw/dq_i = trace(P dJ/dq_i), where
    P = D V diag(c) U^T S (n x 6), c_r = prod_{j != r} s_j (w A^+ weighted; no division, so finite
    at singularities). Column k of dJ/dq_i (`jacobian_derivative`) is (w_i x v_k, w_i x w_k) for
    k >= i and (w_k x v_i, 0) for k < i. With rows P_k = (a_k, b_k) and the scalar triple product:

        dw/dq_i = w_i . sum_{k >= i} c1_k + v_i . sum_{k < i} c2_k,
        c1_k = v_k x a_k + w_k x b_k,  c2_k = a_k x w_k,

    a reversed cumulative sum and an exclusive prefix sum of per-column cross products. Two
    identities turn both into one inclusive prefix sum:
    * sum_k c1_k = 0: sum_k v_k a_k^T and sum_k w_k b_k^T are the diagonal blocks of
      J P = J D V diag(c) U^T S; for a row block with weight alpha > 0 its rows of J D V diag(c)
      are those of A V_k diag(c) / alpha = U_k diag(s c) / alpha = w U_k / alpha (A V_k = U_k
      diag(s), s_r c_r = w, w the manipulability), so the block is w U_k,block U_k,block^T: symmetric,
      and its cross-product part vanishes (a block with weight 0 has a = 0 or b = 0 and
      contributes nothing); hence
      sum_{k >= i} c1_k = -sum_{k < i} c1_k;
    * the k = i terms agree: w_i . c1_i = w_i . (v_i x a_i) = v_i . (a_i x w_i) = v_i . c2_i.
    Hence dw/dq_i = sum_{k <= i} (v_i . c2_k - w_i . c1_k). Prismatic joints need no branch: w = 0
    removes their terms, and the tensor formula holds for them (see `jacobian_derivative`).
    """
    U, s, Vt = svd
    k = s.shape[0]
    PT = ((U if U.shape[1] == k else U[:, :k]) * _cofactors(s)).dot(Vt[:k])  # U diag(c) V^T (6, n);
    if weight is not None:
        PT *= weight  # P^T = S U diag(c) V^T D
    # Y[:, k] = (c2_k, -c1_k): every per-column cross product in one product of a constant with the
    # column-wise outer products JP[6 r + s, k] = J[r, k] P^T[s, k].
    JP = J.take(_OUTER_I, axis=0)
    JP *= PT.take(_OUTER_J, axis=0)
    Y = _GRADIENT_CROSSES.dot(JP)
    # Inclusive prefix sums over k <= i, then dw/dq_i = v_i . Y_acc[:3, i] + w_i . Y_acc[3:, i].
    Y_acc = np.add.accumulate(Y, axis=1)
    Y_acc *= J
    return _ONES6.dot(Y_acc)


def _gradient_crosses() -> np.ndarray:
    """(6, 36) K of `manipulability_gradient_geometric`: for column k, with o = outer(J[:, k],
    P^T[:, k]) (6 x 6, row-major) = outer((v, w), (a, b)), K @ o.ravel() = (a x w, -(v x a + w x b))."""
    eps = LEVI_CIVITA.reshape(3, 3, 3)  # eps[t, i, j]: (x cross y)_t = eps[t, i, j] x_i y_j
    K = np.zeros((6, 6, 6))  # K[t, r, s] multiplies J[r, k] P^T[s, k]
    K[:3, 3:, :3] = eps.transpose(0, 2, 1)  # (a x w)_t = eps[t, i, j] a_i w_j: r = 3 + j, s = i
    K[3:, :3, :3] = -eps  # -(v x a)_t: r = i, s = j
    K[3:, 3:, 3:] = -eps  # -(w x b)_t: r = 3 + i, s = 3 + j
    out = K.reshape(6, 36)
    out.setflags(write=False)
    return out


_GRADIENT_CROSSES = _gradient_crosses()
