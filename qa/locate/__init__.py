"""Locating the phantom's test objects in a volume: the pose from the beads, then each object.

:func:`locate` takes a volume and a phantom definition and returns a
:class:`~qa.locate.layout.Layout`:

1. Bead candidates are found anywhere in the volume (:func:`qa.locate.find.bead_candidates`:
   blobs per plane, the in-focus plane by peak response, out-of-focus copies suppressed).
2. They are matched to the definition's beads, as is and mirrored, and a rigid in-plane
   pose is fitted (:func:`qa.locate.pose.match_beads`; convention in :mod:`qa.locate.pose`).
   When only two beads match, distances cannot tell a mirror image; the chest-wall
   marker (role ``marker``) decides, by its contrast where each pose puts it.
3. Every bead is then searched for at full resolution near its posed place
   (:func:`qa.locate.find.find_bead`) and the pose refitted by least squares on the beads
   found, repeatedly, over those within ``match_tolerance_mm`` of their posed places. A
   blob farther off is not the bead (the others fix the pose to a few hundredths of a
   mm): that bead is reported not found, as is one whose blob is weaker than
   ``min_bead_fraction`` of the matched beads' median (artefacts and noise remain in a
   missing bead's window).
4. Heights: each bead keeps its measured height (the in-focus plane, to a fraction of a
   plane). Every other object gets its nominal height plus ``shift_z_mm``, the beads'
   mean height error, when that error is significant: at least two compact beads and a
   mean farther from 0 than ``t(0.975, n - 1)`` standard errors (Student's two-sided
   t test at 5 %, "The probable error of a mean", Biometrika 6, 1908). Otherwise
   ``shift_z_mm`` is 0 and the note gives the value. Rods (beads at least four times
   longer in z than wide: a bead through a stack of 2-D sections) have no in-focus
   plane; they keep their nominal height and take no part in this.
5. Objects are placed by the pose and refined: edge plates from their sides, disks and the
   marker by matching their footprint. A low-contrast disk is never reported missing for
   its low contrast (that is what detectability measures): it is moved only when its
   footprint stands out by ``min_disk_snr``, otherwise it stays where the pose puts it,
   so that a search over noise cannot bias its SDNR upwards.
6. When fewer than two beads are found in agreement the nominal pose is used, and the
   beads are searched for at their nominal places: ``Pose.fitted_from`` is empty,
   ``residual_mm`` NaN and ``Pose.note`` says why.
   If then not one test object lies inside the volume even at its nominal place (a
   volume of the wrong phantom or spacing, or a few voxels), the volume is refused.
   If no bead at all is found, the note adds :func:`travel_axis_hint`: a volume read
   with its rows and columns exchanged puts the phantom at a mirrored, quarter-turned
   pose that no search covers.

An object not found within its search radius gets ``found=False`` and the note
``"<id> not found near (x, y, z) mm: <reason>"``; the metric families turn that into
"not measured" and the others still run.

Options, in the phantom definition under ``analysis: {locate: {...}}`` (defaults in
:data:`DEFAULTS`), and per object under ``analysis: {locate: {objects: {<id>:
{search_radius_mm: ..., search_half_depth_mm: ...}}}}``.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError
from ..phantom.model import Phantom
from ..volume import Volume
from ..yamlio import Fields
from .find import bead_candidates, find_bead, find_edge_plate, footprint_search
from .layout import Layout, Placed, Pose
from .pose import apply_pose, fit_rigid_2d, match_beads, pose_shape

DEFAULTS = {
    "search_radius_mm": 5.0,       # in-plane search radius about the posed place
    "search_half_depth_mm": 5.0,   # bead search half-depth about the posed height
    "min_peak_snr": 8.0,           # a bead's blob strength over the response noise
    "min_bead_fraction": 0.3,      # ... and over this fraction of the beads' median
    "match_tolerance_mm": 1.5,     # a posed bead and a candidate correspond within this
    "max_rotation_deg": 30.0,      # largest turn about z considered
    "streak_half_angle_deg": 30.0,  # cone of a bead's out-of-focus copies (>= half arc)
    "edge_search_mm": 2.0,         # search across each side of an edge plate
    "disk_search_mm": 1.0,         # search radius of a disk's footprint match
    "min_disk_snr": 10.0,          # a disk is moved only when it stands out this much
    "marker_search_mm": 2.0,       # search radius of the marker's footprint match
    "max_candidates": 40,          # bead candidates kept for matching
}
_PER_OBJECT = ("search_radius_mm", "search_half_depth_mm")


def read_options(phantom: Phantom) -> tuple[dict, dict]:
    """Locator options from ``analysis.locate`` of the definition, checked.

    Returns
    -------
    (options, per_object)
        ``per_object`` maps object ids to their own overrides.

    Raises
    ------
    InputError
        Unknown option, object id or non-positive number, with file, line and field.
    """
    raw = phantom.analysis.get("locate", {}) or {}
    fields = Fields(raw, phantom.source or "phantom definition", "analysis.locate")
    out = {}
    for key, default in DEFAULTS.items():
        if isinstance(default, int):
            out[key] = fields.integer(key, default, minimum=2)
        else:
            out[key] = float(fields.number(key, default, positive=True))
    per = {}
    ids = {o.id for o in phantom.objects}
    objs = fields.sub("objects", {})
    for oid in list(objs.map):
        one = objs.sub(oid)
        if oid not in ids:
            raise objs.error(oid, f"no object '{oid}' in this phantom")
        per[oid] = {k: one.number(k, out[k], positive=True) for k in _PER_OBJECT}
        one.reject_unknown()
    fields.reject_unknown()
    return out, per


def _where(xyz) -> str:
    return f"({xyz[0]:.1f}, {xyz[1]:.1f}, {xyz[2]:.1f}) mm"


def _inside(volume: Volume, xyz) -> bool:
    idx = volume.to_index((xyz[2], xyz[1], xyz[0]))
    return all(-0.5 <= i <= n - 0.5 for i, n in zip(idx, volume.shape))


def _require_overlap(volume: Volume, phantom: Phantom) -> None:
    """Refuse a volume in which no test object lies, even at its nominal place."""
    objects = [o for o in phantom.objects if o.role != "background"]
    if not objects or any(_inside(volume, o.shape.centre_xyz_mm) for o in objects):
        return
    lo = volume.to_mm((-0.5, -0.5, -0.5))
    hi = volume.to_mm(np.asarray(volume.shape, float) - 0.5)
    span = ", ".join(f"{a} {lo[k]:.1f} to {hi[k]:.1f}" for k, a in ((2, "x"), (1, "y"), (0, "z")))
    shape = " x ".join(str(n) for n in volume.shape)
    raise InputError(f"no test object of phantom '{phantom.name}' lies inside the volume "
                     f"({shape} voxels; {span} mm) and its beads give no pose; expected "
                     "a reconstruction of this phantom", source=volume.meta.get("source_file"))


def travel_axis_hint(meta) -> str:
    """The note for a volume in which no bead was found anywhere.

    Parameters
    ----------
    meta : mapping
        The volume's metadata; ``meta["travel_axis"]`` (``"rows"`` when absent) is how
        it was read (:func:`qa.io.read_volume`).

    Returns
    -------
    str
        A suggestion to read the volume with the other travel axis.

    Examples
    --------
    >>> travel_axis_hint({})[:45]
    'no bead found anywhere in the volume, read wi'
    """
    axis = "columns" if meta.get("travel_axis") == "columns" else "rows"
    other = "rows" if axis == "columns" else "columns"
    return (f"no bead found anywhere in the volume, read with the source travel along its "
            f"{axis}: if the unit stores the travel along the {other}, assess it with "
            f"--travel-axis {other}")


def _is_rod(obj) -> bool:
    h = obj.shape.half_xyz_mm
    return h[2] >= 4.0 * max(h[0], h[1])


def _polarity(phantom: Phantom, obj) -> float:
    bg = phantom.background
    mu_bg = bg.mu_per_mm if bg is not None and bg.mu_per_mm is not None else 0.0
    return 1.0 if (obj.mu_per_mm or 0.0) >= mu_bg else -1.0


def _search_beads(volume, phantom, beads, pose, z_offset, opts, per, confirmed=None):
    """Full-resolution search of every bead about its posed place: {id: (Found|None, why)}.

    Blobs weaker than ``min_bead_fraction`` of the median strength of the ``confirmed``
    beads (those matched when fitting the pose; else of all found) are not beads.
    """
    out = {}
    for obj in beads:
        o = per.get(obj.id, opts)
        expected = apply_pose(pose, obj.shape.centre_xyz_mm)
        expected[2] += z_offset
        out[obj.id] = find_bead(volume, expected, radius_mm=obj.shape.half_xyz_mm[0],
                                search_radius_mm=o["search_radius_mm"],
                                half_depth_mm=o["search_half_depth_mm"],
                                polarity=_polarity(phantom, obj), min_snr=opts["min_peak_snr"],
                                rod=_is_rod(obj))
    ref = [f.strength for i, (f, _) in out.items()
           if f is not None and (confirmed is None or i in confirmed)]
    if ref:
        median = float(np.median(ref))
        for oid, (f, _) in out.items():
            if f is not None and f.strength < opts["min_bead_fraction"] * median:
                out[oid] = (None, f"strongest blob only {f.strength / median:.0%} of the "
                                  "beads' median strength")
    return out


def _marker_snr(volume, phantom, pose, z_offset) -> float:
    """Largest contrast over noise of the phantom's markers where ``pose`` puts them."""
    best = -np.inf
    for m in phantom.with_role("marker"):
        shape = pose_shape(m.shape, pose)
        x, y, z = shape.centre_xyz_mm
        fp = footprint_search(volume, shape.moved((x, y, z + z_offset)), search_mm=0.0,
                              polarity=_polarity(phantom, m), ring_mm=(0.5, 1.5))
        if fp is not None:
            best = max(best, fp.snr_at_expected)
    return best


def _fit(beads, found, pose, opts):
    """Refit the pose by least squares on the beads found near their posed places.

    Starting from the matched pose, the beads within ``match_tolerance_mm`` of their posed
    places are fitted and the residuals recomputed until the set settles (the match's
    consensus set, refined). Returns (Pose or None, ids used, {id: distance} of the
    others found).
    """
    m = np.array([-1.0, 1.0]) if pose.mirrored else np.ones(2)
    nominal = {b.id: np.asarray(b.shape.centre_xyz_mm) for b in beads}
    ids = [b.id for b in beads if found[b.id][0] is not None]

    def residuals(p):
        return {i: float(np.linalg.norm(apply_pose(p, nominal[i])[:2]
                                        - np.asarray(found[i][0].xyz_mm[:2]))) for i in ids}

    res = residuals(pose)
    use = [i for i in ids if res[i] <= opts["match_tolerance_mm"]]
    fitted = None
    for _ in range(4):
        if len(use) < 2:
            return None, use, {}
        rot, shift, rms = fit_rigid_2d([nominal[i][:2] * m for i in use],
                                       [found[i][0].xyz_mm[:2] for i in use])
        fitted = Pose((float(shift[0]), float(shift[1])), rot, pose.mirrored, rms)
        res = residuals(fitted)
        again = [i for i in ids if res[i] <= opts["match_tolerance_mm"]]
        if again == use:
            break
        use = again
    return fitted, use, {i: res[i] for i in ids if i not in use}


def _z_shift(beads, found, use) -> tuple[float, str]:
    """The beads' mean height error if it is significant (module notes, step 4)."""
    errs = [found[b.id][0].xyz_mm[2] - b.shape.centre_xyz_mm[2]
            for b in beads if b.id in use and not _is_rod(b)]
    if not errs:
        return 0.0, ""
    if len(errs) == 1:
        return 0.0, f"height offset {errs[0]:+.2f} mm from one bead, not applied"
    from scipy import stats  # imported here: scipy.stats is slow to import

    n = len(errs)
    mean, se = float(np.mean(errs)), float(np.std(errs, ddof=1) / math.sqrt(n))
    text = f"height offset {mean:+.2f} ± {se:.2f} mm from {n} beads"
    if abs(mean) > stats.t.ppf(0.975, n - 1) * se:
        return mean, text + ", applied"
    return 0.0, text + ", not significant"


def _place(volume, phantom, obj, pose, found, opts) -> Placed:
    """One object placed by the pose and refined by its finder (module notes, step 5)."""
    shape = pose_shape(obj.shape, pose)
    pol = _polarity(phantom, obj)

    def missing(why):
        where = _where(shape.centre_xyz_mm)
        return Placed(obj, shape, False, f"{obj.id} not found near {where}: {why}")

    if obj.role == "bead":
        f, why = found[obj.id]
        if f is None:
            return missing(why)
        z = shape.centre_xyz_mm[2] if _is_rod(obj) else f.xyz_mm[2]
        return Placed(obj, pose_shape(obj.shape, pose, (f.xyz_mm[0], f.xyz_mm[1], z)))
    if obj.role == "background":
        return Placed(obj, shape)
    if not _inside(volume, shape.centre_xyz_mm):
        return missing("outside the volume")
    if obj.role == "edge" or (obj.role == "marker" and shape.kind == "box"):
        search = opts["edge_search_mm"] if obj.role == "edge" else opts["marker_search_mm"]
        refined, why = find_edge_plate(volume, shape, search_mm=search, polarity=pol,
                                       min_snr=opts["min_peak_snr"] / 2.0,
                                       refine_turn=obj.role == "edge")
        return Placed(obj, refined) if refined is not None else missing(why)
    if obj.role in ("disk", "marker"):
        if obj.role == "disk":
            r = shape.half_xyz_mm[0]
            kw = dict(search_mm=opts["disk_search_mm"], inner_grow_mm=0.0,
                      ring_mm=(0.5 * r, 1.5 * r))
        else:
            kw = dict(search_mm=opts["marker_search_mm"], ring_mm=(0.5, 1.5))
        fp = footprint_search(volume, shape, polarity=pol, **kw)
        if fp is None:
            return missing("its window is outside the volume")
        if obj.role == "marker" and fp.snr < opts["min_peak_snr"]:
            return missing(f"footprint contrast {fp.snr:.1f} x noise, "
                           f"needs {opts['min_peak_snr']:g}")
        if obj.role == "marker" or fp.snr >= opts["min_disk_snr"]:
            shape = shape.moved((fp.xy_mm[0], fp.xy_mm[1], shape.centre_xyz_mm[2]))
    return Placed(obj, shape)


def _match(volume, phantom, beads, opts):
    """Candidates in the whole volume matched to the beads (steps 1-2), or None."""
    if len(beads) < 2:
        return None
    cand = bead_candidates(volume, radius_mm=min(b.shape.half_xyz_mm[0] for b in beads),
                           polarity=_polarity(phantom, beads[0]),
                           min_snr=opts["min_peak_snr"] / 2.0,
                           cone_half_angle_deg=opts["streak_half_angle_deg"],
                           max_candidates=opts["max_candidates"])
    return match_beads([b.shape.centre_xyz_mm for b in beads], cand.xyz_mm,
                       strengths=cand.strength, rods=[_is_rod(b) for b in beads],
                       tolerance_mm=opts["match_tolerance_mm"],
                       z_tolerance_mm=max(3.0, 1.5 * volume.spacing_mm[0]),
                       max_rotation_deg=opts["max_rotation_deg"])


def locate(volume: Volume, phantom: Phantom) -> Layout:
    """Find the phantom's pose in ``volume`` and place every test object (module notes).

    Parameters
    ----------
    volume : Volume
    phantom : Phantom
        The definition; its beads fix the pose.

    Returns
    -------
    Layout
        Every object placed, with the fitted :class:`~qa.locate.layout.Pose`.

    Raises
    ------
    InputError
        Malformed ``analysis.locate`` options in the definition, or no test object
        inside the volume and no pose from the beads.
    """
    opts, per = read_options(phantom)
    beads = phantom.with_role("bead")
    match = _match(volume, phantom, beads, opts)
    notes, pose, z_guess, fitted = [], Pose(), 0.0, None
    if match is not None:
        pose = match.pose
        z_guess = match.z_offset_mm if np.isfinite(match.z_offset_mm) else 0.0
        if match.ambiguous and match.other is not None:
            marks = {p.mirrored: _marker_snr(volume, phantom, p, z_guess)
                     for p in (pose, match.other)}
            if np.isfinite(max(marks.values())):
                if marks[not pose.mirrored] > marks[pose.mirrored]:
                    pose = match.other
                notes.append("laterality from the chest-wall marker (too few beads to tell)")
            else:
                notes.append("laterality uncertain (too few beads, no marker): taken from "
                             "the stronger of the two fits")
        confirmed = {beads[i].id for i, _ in match.pairs}
        found = _search_beads(volume, phantom, beads, pose, z_guess, opts, per, confirmed)
        fitted, use, rejected = _fit(beads, found, pose, opts)
    if fitted is None:
        _require_overlap(volume, phantom)
        found = _search_beads(volume, phantom, beads, Pose(), 0.0, opts, per)
        n_found = sum(f is not None for f, _ in found.values())
        if len(beads) < 2:
            why = (f"pose not determined: the definition has {len(beads)} bead(s), a pose "
                   "needs 2; nominal pose used")
        else:
            why = (f"pose not determined: {n_found} of {len(beads)} beads found at their "
                   "nominal places, at least 2 needed in agreement; nominal pose used")
        if beads and n_found == 0:
            notes.append(travel_axis_hint(volume.meta))
        pose = Pose(residual_mm=float("nan"), note="; ".join([why] + notes))
    else:
        for oid, dist in rejected.items():
            found[oid] = (None, f"the blob found is {dist:.1f} mm from where the pose of the "
                                "other beads puts it")
        shift_z, z_note = _z_shift(beads, found, use)
        notes += [z_note] if z_note else []
        pose = Pose(fitted.shift_xy_mm, fitted.rotation_deg, fitted.mirrored, fitted.residual_mm,
                    tuple(use), shift_z, "; ".join(notes))
    placed = {o.id: _place(volume, phantom, o, pose, found, opts) for o in phantom.objects}
    return Layout(phantom, placed, pose)


__all__ = ["locate", "read_options", "travel_axis_hint", "DEFAULTS", "Layout", "Placed", "Pose"]
