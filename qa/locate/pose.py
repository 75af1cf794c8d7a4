"""The phantom's pose in a volume: matching found beads to the definition, rigid 2-D fit.

The pose convention
-------------------
A :class:`~qa.locate.layout.Pose` maps a point ``(x, y, z)`` of the phantom definition to
the volume's coordinates (mm)::

    [x', y'] = R(rotation) M [x, y] + shift_xy,     z' = z + shift_z

``M = diag(-1, 1)`` for a mirrored pose, else the identity: a mirrored image is one whose
laterality is flipped, which reverses ``x`` (the direction of source travel, parallel to
the chest wall) and keeps ``y`` (chest wall to nipple) and ``z``. ``R`` turns by
``rotation_deg`` counter-clockwise (from ``+x`` towards ``+y``) about the phantom's own
origin ``(0, 0)``; the shift is applied last. An image flipped about the volume's centre
line ``x = c`` is therefore a mirrored pose with a shift of ``2 c`` in x.

Matching
--------
Candidates (bright compact blobs, :func:`qa.locate.find.bead_candidates`) are matched to
the nominal beads by exhaustive pairing: every pair of nominal beads is put on every
ordered pair of candidates at the same distance (and height difference), once as is and
once mirrored; each such hypothesis poses all the beads and counts the candidates that
fall within a tolerance. The hypothesis with the most such inliers wins, ties going to the
one whose inliers are the stronger blobs (a consensus over every minimal sample instead
of a random draw of them: Fischler & Bolles 1981 [1]_), and the pose is then refitted by
least squares over its inliers (Kabsch 1976 [2]_; Umeyama 1991 [3]_).

References
----------
.. [1] M. A. Fischler, R. C. Bolles, "Random sample consensus: a paradigm for model
       fitting with applications to image analysis and automated cartography",
       Communications of the ACM 24(6), 381-395, 1981.
.. [2] W. Kabsch, "A solution for the best rotation to relate two sets of vectors",
       Acta Crystallographica A32, 922-923, 1976.
.. [3] S. Umeyama, "Least-squares estimation of transformation parameters between two
       point patterns", IEEE Trans. Pattern Analysis and Machine Intelligence 13(4),
       376-380, 1991.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..phantom.model import Shape
from .layout import Pose


def rotation_2d(rotation_deg: float) -> np.ndarray:
    """The 2 x 2 matrix turning by ``rotation_deg`` from +x towards +y."""
    t = np.radians(rotation_deg)
    return np.array([[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]])


def pose_matrix(pose: Pose) -> np.ndarray:
    """The linear part ``R M`` of a pose (2 x 2)."""
    m = np.diag([-1.0, 1.0]) if pose.mirrored else np.eye(2)
    return rotation_2d(pose.rotation_deg) @ m


def apply_pose(pose: Pose, points_xyz_mm) -> np.ndarray:
    """Points ``(..., 3)`` of the phantom definition in volume coordinates (module notes)."""
    p = np.array(points_xyz_mm, dtype=float)
    out = p.copy()
    out[..., :2] = p[..., :2] @ pose_matrix(pose).T + np.asarray(pose.shift_xy_mm)
    out[..., 2] = p[..., 2] + pose.shift_z_mm
    return out


def pose_shape(shape: Shape, pose: Pose, centre_xyz_mm=None) -> Shape:
    """``shape`` as posed: its centre moved (to ``centre_xyz_mm`` if given) and turned.

    Notes
    -----
    The solids are symmetric under a flip of their own x axis, so a mirrored solid is
    the same kind of solid with its rotation ``R_obj`` replaced by ``M R_obj M``. For
    ``R_obj = Rz(c) Ry(b) Rx(a)`` and ``M = diag(-1, 1, 1)`` that is
    ``Rz(-c) Ry(-b) Rx(a)``; the pose's turn then adds to the z angle.
    """
    rx, ry, rz = shape.rotation_deg
    if pose.mirrored:
        ry, rz = -ry, -rz
    centre = apply_pose(pose, shape.centre_xyz_mm) if centre_xyz_mm is None else centre_xyz_mm
    return Shape(shape.kind, tuple(float(c) for c in centre), shape.half_xyz_mm,
                 (rx, ry, float(rz + pose.rotation_deg)))


def wrap_deg(angle_deg):
    """Angles wrapped into [-180, 180)."""
    return (np.asarray(angle_deg) + 180.0) % 360.0 - 180.0


def fit_rigid_2d(source_xy, target_xy) -> tuple[float, np.ndarray, float]:
    """Least-squares rotation and shift taking ``source_xy`` onto ``target_xy``.

    Parameters
    ----------
    source_xy, target_xy : (n, 2) array_like, mm
        Corresponding points, n >= 2 (n = 1 gives a pure shift).

    Returns
    -------
    rotation_deg : float
    shift_xy_mm : (2,) ndarray
    rms_mm : float
        RMS distance between the moved source points and the targets.

    Notes
    -----
    With centroids ``p0, q0`` and ``H = sum (p - p0)(q - q0)^T = U S V^T``, the rotation
    minimising ``sum |R p + t - q|^2`` is ``R = V diag(1, det(V U^T)) U^T`` and
    ``t = q0 - R p0``. The determinant term keeps ``R`` a proper rotation: mirroring is
    decided outside, by fitting ``M p`` as well.

    References
    ----------
    .. [1] W. Kabsch, Acta Crystallographica A32, 922-923, 1976.
    .. [2] S. Umeyama, IEEE Trans. Pattern Analysis and Machine Intelligence 13(4),
           376-380, 1991.

    Examples
    --------
    >>> rot, shift, rms = fit_rigid_2d([[0, 0], [10, 0]], [[5, 5], [5, 15]])
    >>> round(rot, 6), [round(float(v), 6) for v in shift], round(rms, 9)
    (90.0, [5.0, 5.0], 0.0)
    """
    p = np.asarray(source_xy, dtype=float).reshape(-1, 2)
    q = np.asarray(target_xy, dtype=float).reshape(-1, 2)
    p0, q0 = p.mean(axis=0), q.mean(axis=0)
    if len(p) < 2:
        return 0.0, q0 - p0, 0.0
    u, _, vt = np.linalg.svd((p - p0).T @ (q - q0))
    d = float(np.sign(np.linalg.det(vt.T @ u.T))) or 1.0
    r = vt.T @ np.diag([1.0, d]) @ u.T
    t = q0 - r @ p0
    rms = float(np.sqrt(np.mean(np.sum((p @ r.T + t - q) ** 2, axis=1))))
    return float(np.degrees(np.arctan2(r[1, 0], r[0, 0]))), t, rms


@dataclass(frozen=True)
class Match:
    """The best correspondence of nominal beads to candidates under one pose.

    ``pairs`` holds ``(nominal index, candidate index)``; ``z_offset_mm`` is the mean
    height difference (candidate minus nominal) over the compact beads among them
    (NaN when there are none); ``ambiguous`` is True when the other laterality fits as
    many candidates as well (two beads: distances alone cannot tell a mirror image);
    ``pose`` is then the fit on the stronger candidates and ``other`` the alternative.
    """

    pose: Pose
    pairs: tuple[tuple[int, int], ...]
    rms_mm: float
    z_offset_mm: float
    ambiguous: bool
    other: Pose | None = None


def _assign(posed_xy, cand_xyz, nominal_z, rods, z_offset, tol_mm, tol_z_mm):
    """One-to-one nearest assignment of posed nominal beads to candidates within tolerance."""
    d = np.linalg.norm(posed_xy[:, None, :] - cand_xyz[None, :, :2], axis=-1)
    dzs = np.abs(cand_xyz[None, :, 2] - nominal_z[:, None] - z_offset)
    ok = (d <= tol_mm) & ((dzs <= tol_z_mm) | rods[:, None])
    d = np.where(ok, d, np.inf)
    pairs, used = [], set()
    for flat in np.argsort(d, axis=None):
        i, j = np.unravel_index(flat, d.shape)
        if not np.isfinite(d[i, j]):
            break
        if i in {a for a, _ in pairs} or j in used:
            continue
        pairs.append((int(i), int(j)))
        used.add(int(j))
    return sorted(pairs)


def _refit(mirrored, pairs, nominal_xyz, cand_xyz, rods):
    m = np.array([-1.0, 1.0]) if mirrored else np.ones(2)
    src = nominal_xyz[[i for i, _ in pairs], :2] * m
    dst = cand_xyz[[j for _, j in pairs], :2]
    rot, shift, rms = fit_rigid_2d(src, dst)
    compact = [(i, j) for i, j in pairs if not rods[i]]
    dz = (float(np.mean([cand_xyz[j, 2] - nominal_xyz[i, 2] for i, j in compact]))
          if compact else float("nan"))
    return Pose((float(shift[0]), float(shift[1])), rot, mirrored, rms), rms, dz


def match_beads(nominal_xyz_mm, candidates_xyz_mm, *, strengths=None, rods=None,
                tolerance_mm: float = 1.5, z_tolerance_mm: float = 3.0,
                max_rotation_deg: float = 30.0, min_separation_mm: float = 3.0) -> Match | None:
    """Match nominal beads to bead candidates and fit the pose (module notes).

    Parameters
    ----------
    nominal_xyz_mm : (n, 3) array_like
        Bead centres of the definition.
    candidates_xyz_mm : (m, 3) array_like
        Candidate centres found in the volume; extra ones and missing beads are allowed.
    strengths : (m,) array_like, optional
        Candidate strengths: among hypotheses with as many inliers, the one whose
        inliers are strongest wins (with two beads, any two blobs at the right distance
        fit exactly; the beads are the strongest blobs of their size).
    rods : (n,) bool array_like, optional
        Beads whose height cannot be measured (rods through a stack of sections): their
        height is not compared.
    tolerance_mm : float
        In-plane distance within which a posed bead and a candidate correspond.
    z_tolerance_mm : float
        Allowed scatter of the height differences (the in-focus plane of a DBT bead is
        found to about a plane spacing).
    max_rotation_deg : float
        Largest turn about z considered.
    min_separation_mm : float
        Nominal pairs closer than this are not used to make hypotheses (their direction
        is poorly defined).

    Returns
    -------
    Match or None
        None when no two beads could be matched.
    """
    nom = np.asarray(nominal_xyz_mm, dtype=float).reshape(-1, 3)
    cand = np.asarray(candidates_xyz_mm, dtype=float).reshape(-1, 3)
    n, m = len(nom), len(cand)
    rods = np.zeros(n, bool) if rods is None else np.asarray(rods, bool)
    if n < 2 or m < 2:
        return None
    weight = np.ones(m) if strengths is None else np.asarray(strengths, float) / np.max(strengths)
    ii, kk = np.triu_indices(n, 1)
    aa, bb = np.nonzero(~np.eye(m, dtype=bool))
    best = {}
    for mirrored in (False, True):
        p = nom[:, :2] * (np.array([-1.0, 1.0]) if mirrored else 1.0)
        dp, dc = p[kk] - p[ii], cand[bb, :2] - cand[aa, :2]
        ln, lc = np.linalg.norm(dp, axis=1), np.linalg.norm(dc, axis=1)
        dzn, dzc = nom[kk, 2] - nom[ii, 2], cand[bb, 2] - cand[aa, 2]
        ok = ((np.abs(ln[:, None] - lc[None, :]) <= tolerance_mm)
              & (ln[:, None] >= min_separation_mm))
        ok &= ((np.abs(dzn[:, None] - dzc[None, :]) <= z_tolerance_mm)
               | (rods[ii] | rods[kk])[:, None])
        theta = wrap_deg(np.degrees(np.arctan2(dc[:, 1], dc[:, 0]))[None, :]
                         - np.degrees(np.arctan2(dp[:, 1], dp[:, 0]))[:, None])
        ok &= np.abs(theta) <= max_rotation_deg
        hn, hc = np.nonzero(ok)
        # Height offset of each hypothesis from the compact beads of its pair (0 for rods).
        wi, wk = (~rods[ii[hn]]).astype(float), (~rods[kk[hn]]).astype(float)
        zoff = ((cand[aa[hc], 2] - nom[ii[hn], 2]) * wi + (cand[bb[hc], 2] - nom[kk[hn], 2]) * wk)
        zoff = zoff / np.maximum(wi + wk, 1.0)
        for lo in range(0, hn.size, 2000):  # in chunks, to bound the memory used
            sl = slice(lo, lo + 2000)
            th = np.radians(theta[hn[sl], hc[sl]])
            rot = np.stack([np.stack([np.cos(th), -np.sin(th)], -1),
                            np.stack([np.sin(th), np.cos(th)], -1)], -2)  # (h, 2, 2)
            mid_p = 0.5 * (p[ii[hn[sl]]] + p[kk[hn[sl]]])
            mid_c = 0.5 * (cand[aa[hc[sl]], :2] + cand[bb[hc[sl]], :2])
            shift = mid_c - np.einsum("hij,hj->hi", rot, mid_p)  # pair midpoints coincide
            posed = np.einsum("hij,nj->hni", rot, p) + shift[:, None]
            d = np.linalg.norm(posed[:, :, None, :] - cand[None, None, :, :2], axis=-1)
            dz = np.abs(cand[None, None, :, 2] - nom[None, :, None, 2] - zoff[sl, None, None])
            d = np.where((dz <= z_tolerance_mm) | rods[None, :, None], d, np.inf)
            near, which = d.min(axis=2), d.argmin(axis=2)
            inl = near <= tolerance_mm
            # Score: inliers, then their strength, then closeness (larger is better).
            score = np.stack([inl.sum(axis=1),
                              np.round(np.where(inl, weight[which], 0.0).sum(axis=1), 2),
                              -np.where(inl, near ** 2, 0.0).sum(axis=1)], 1)
            h = int(np.lexsort(score.T[::-1] * -1)[0])
            if mirrored not in best or tuple(score[h]) > best[mirrored][0]:
                best[mirrored] = (tuple(score[h]), posed[h], float(zoff[sl][h]))
    if not best:
        return None
    fits = {}
    for mirrored, (_, posed, zoff) in best.items():
        pairs = _assign(posed, cand, nom[:, 2], rods, zoff, tolerance_mm, z_tolerance_mm)
        if len(pairs) < 2:
            continue
        for _ in range(3):  # refit, re-assign with the refined pose, until it settles
            pose, rms, dz = _refit(mirrored, pairs, nom, cand, rods)
            posed = apply_pose(pose, nom)[:, :2]
            again = _assign(posed, cand, nom[:, 2], rods, dz if np.isfinite(dz) else zoff,
                            tolerance_mm, z_tolerance_mm)
            if again == pairs or len(again) < 2:
                break
            pairs = again
        mass = round(float(sum(weight[j] for _, j in pairs)), 2)
        fits[mirrored] = (len(pairs), mass, rms, pose, tuple(pairs), dz)
    if not fits:
        return None
    # More beads, then stronger candidates, then a smaller RMS.
    order = sorted(fits.values(), key=lambda f: (-f[0], -f[1], f[2]))
    count, _, rms, pose, pairs, dz = order[0]
    other = order[1] if len(order) > 1 else None
    ambiguous = (other is not None and other[0] == count and other[2] <= tolerance_mm / 3
                 and rms <= tolerance_mm / 3)
    return Match(pose, pairs, rms, dz, ambiguous, other[3] if other else None)
