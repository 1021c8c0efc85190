"""Builders of reckon.v1.Sample messages, and the planar geometry that turns
a camera's detection of a mapped marker into a fix.

Frames and units are those of proto/reckon/v1/robot.proto: the field frame
has x and y on the floor in metres and z up; the body frame has +x forward
and +y left; headings are radians, counter-clockwise from +x; stamps are
int64 nanoseconds on the robot's time base (its controller's monotonic
clock), which for a fix is the capture time, never the arrival time.

A planar pose is a tuple (x_m, y_m, heading_rad). A covariance is given
either as an n x n nested sequence or as a flat row-major sequence of n*n
numbers; diag() builds a diagonal one. The builders do not judge the
values: the service checks them and answers a bad one with VERDICT_INVALID
and a reason naming the field.
"""

from __future__ import annotations

import math
from typing import Iterable, Optional, Sequence, Tuple

from reckonpy._pb.reckon.v1 import robot_pb2, samples_pb2

Pose2 = Tuple[float, float, float]
"""Pose2 is a planar pose (x_m, y_m, heading_rad)."""

NO_MOUNT: Pose2 = (0.0, 0.0, 0.0)
"""NO_MOUNT is a sensor mounted at the body origin, facing forward. Passed
as a builder's mount it overrides the mount in the robot's sensors
configuration; to use the configured mount, pass None (the default)."""


def diag(*variances: float) -> list:
    """diag returns the flat row-major covariance with variances on its
    diagonal (m^2 for positions, rad^2 for angles) and zeros elsewhere."""
    n = len(variances)
    return [variances[i] if i == j else 0.0 for i in range(n) for j in range(n)]


def covariance(cov, dimension: int) -> robot_pb2.Covariance:
    """covariance returns the reckon.v1.Covariance of cov, an n x n nested
    sequence or a flat row-major sequence of n*n numbers, stating dimension
    as n. It raises ValueError if cov does not have dimension*dimension
    entries (a programming error; the values themselves are for the
    service to judge)."""
    values = [float(v) for row in cov for v in (row if isinstance(row, Iterable) else [row])]
    if len(values) != dimension * dimension:
        raise ValueError(f"covariance: want {dimension}x{dimension} = {dimension * dimension} entries, got {len(values)}")
    return robot_pb2.Covariance(dimension=dimension, values=values)


def _mount(mount: Optional[Sequence[float]]) -> Optional[robot_pb2.FloorPose]:
    if mount is None:
        return None
    mx, my, mh = mount
    return robot_pb2.FloorPose(x_m=mx, y_m=my, heading_rad=mh)


def pose_fix(stamp_ns: int, sensor_id: str, x_m: float, y_m: float, heading_rad: float,
             cov, mount: Optional[Sequence[float]] = None, marker: str = "") -> samples_pb2.Sample:
    """pose_fix returns a Sample carrying a pose fix: the sensor's measured
    field pose (x_m, y_m, heading_rad) at stamp_ns (capture time on the
    robot's time base), its 3x3 covariance cov (m^2, m*rad, rad^2), and,
    if given, the sensor's mount (x_m, y_m, heading_rad) in the body frame,
    which overrides the mount in the robot's sensors configuration (None:
    the configured mount). marker names the marker the pose was computed
    from, as the detector decoded it (at most 128 bytes; "" unknown): move
    recovery then waits for refused fixes of two markers to agree before it
    reseeds the robot, so that one marker misread as another on every frame
    does not move the estimate."""
    fix = samples_pb2.Fix(
        stamp_ns=int(stamp_ns), sensor_id=sensor_id,
        pose=samples_pb2.PoseFix(x_m=x_m, y_m=y_m, heading_rad=heading_rad, marker=marker),
        covariance=covariance(cov, 3))
    if mount is not None:
        fix.mount.CopyFrom(_mount(mount))
    return samples_pb2.Sample(fix=fix)


def landmark_fix(stamp_ns: int, sensor_id: str, landmark_id: str, range_m: Optional[float] = None,
                 bearing_rad: Optional[float] = None, cov=None,
                 mount: Optional[Sequence[float]] = None) -> samples_pb2.Sample:
    """landmark_fix returns a Sample carrying a range and/or bearing from
    the sensor to the mapped landmark landmark_id, at stamp_ns (capture
    time on the robot's time base). range_m is in metres; bearing_rad is
    from the sensor's +x, counter-clockwise. cov is 2x2 (range first) with
    both, 1x1 with one. mount, if given, is the sensor's pose in the body
    frame and overrides the configured one (None: the configured mount)."""
    if range_m is None and bearing_rad is None:
        raise ValueError("landmark_fix: give range_m, bearing_rad or both")
    if cov is None:
        raise ValueError("landmark_fix: cov is required")
    lm = samples_pb2.LandmarkFix(landmark_id=landmark_id)
    if range_m is not None:
        lm.range_m = range_m
    if bearing_rad is not None:
        lm.bearing_rad = bearing_rad
    n = (range_m is not None) + (bearing_rad is not None)
    fix = samples_pb2.Fix(stamp_ns=int(stamp_ns), sensor_id=sensor_id, landmark=lm, covariance=covariance(cov, n))
    if mount is not None:
        fix.mount.CopyFrom(_mount(mount))
    return samples_pb2.Sample(fix=fix)


def compose(a: Pose2, b: Pose2) -> Pose2:
    """compose returns a ∘ b: the pose b, given in the frame of a, in the
    frame a is given in. Headings wrap to (-pi, pi]."""
    ax, ay, ah = a
    bx, by, bh = b
    c, s = math.cos(ah), math.sin(ah)
    return (ax + c * bx - s * by, ay + s * bx + c * by, wrap(ah + bh))


def inverse(p: Pose2) -> Pose2:
    """inverse returns the pose q with p ∘ q = (0, 0, 0): the frame p was
    given in, seen from p."""
    x, y, h = p
    c, s = math.cos(h), math.sin(h)
    return (-c * x - s * y, s * x - c * y, wrap(-h))


def wrap(angle_rad: float) -> float:
    """wrap returns angle_rad wrapped to (-pi, pi], radians."""
    w = math.remainder(angle_rad, 2 * math.pi)
    return math.pi if w == -math.pi else w


def camera_pose_from_marker(marker_field: Pose2, marker_in_camera: Pose2) -> Pose2:
    """camera_pose_from_marker returns the camera's field pose given a
    mapped marker's field pose and the marker's pose as the camera saw it,
    both planar: marker_in_camera is (x forward, y left, yaw of the marker's
    heading from the camera's +x), metres and radians. The camera pose is
    marker_field ∘ inverse(marker_in_camera).

    A marker's heading is whatever direction its map states; with
    optical_to_planar below it is the direction its face points (its
    outward normal), so a marker seen face-on has yaw pi."""
    return compose(marker_field, inverse(marker_in_camera))


def optical_to_planar(rotation: Sequence[Sequence[float]], translation_m: Sequence[float]) -> Pose2:
    """optical_to_planar turns a marker's 3-D pose in a camera's optical
    frame into its planar pose in the camera's floor frame.

    The optical frame is the one pose estimation from images usually
    returns (a rotation matrix from a rotation vector, and a translation,
    common practice): +x right in the image, +y down, +z along the optical
    axis; the marker's own +z is its face's outward normal. The camera
    must be mounted level (optical axis horizontal, image rows
    horizontal): then forward is optical +z, left is optical -x, and the
    vertical (optical y) is dropped. Returns (x forward, y left, yaw of
    the marker's normal), metres and radians. For a tilted camera, first
    rotate the pose into a level frame."""
    tx, _, tz = translation_m
    # The marker's normal is the third column of the rotation matrix.
    nx, nz = rotation[0][2], rotation[2][2]
    return (tz, -tx, wrap(math.atan2(-nx, nz)))


def fix_from_camera(stamp_ns: int, sensor_id: str, marker_field: Pose2, marker_in_camera: Pose2,
                    cov, mount: Optional[Sequence[float]] = None, marker: str = "") -> samples_pb2.Sample:
    """fix_from_camera returns a pose fix of the camera from its detection
    of a mapped marker: marker_field is the marker's field pose (x_m, y_m,
    heading_rad), marker_in_camera its planar pose as the camera saw it
    (see camera_pose_from_marker, and optical_to_planar for a 3-D
    detection). stamp_ns is the capture time on the robot's time base; cov
    the 3x3 covariance of the camera's field pose (m^2, m*rad, rad^2);
    mount, if given, the camera's pose in the body frame, which the service
    uses to relate the camera's pose to the robot's (None: the mount of the
    robot's sensors configuration); marker, the detected marker's name (see
    pose_fix)."""
    x, y, h = camera_pose_from_marker(marker_field, marker_in_camera)
    return pose_fix(stamp_ns, sensor_id, x, y, h, cov, mount, marker)


def landmark_fix_from_camera(stamp_ns: int, sensor_id: str, landmark_id: str,
                             marker_in_camera: Pose2, cov, mount: Optional[Sequence[float]] = None,
                             use_range: bool = True, use_bearing: bool = True) -> samples_pb2.Sample:
    """landmark_fix_from_camera returns a landmark fix from a camera's
    detection of a mapped landmark: the range (metres) and bearing
    (radians, counter-clockwise from the camera's +x) of the marker's
    position in marker_in_camera (x forward, y left; its yaw is not used).
    cov is 2x2 (range first) with both, 1x1 with one. mount, if given, is
    the camera's pose in the body frame and overrides the configured one
    (None: the configured mount)."""
    x, y, _ = marker_in_camera
    return landmark_fix(stamp_ns, sensor_id, landmark_id,
                        range_m=math.hypot(x, y) if use_range else None,
                        bearing_rad=math.atan2(y, x) if use_bearing else None,
                        cov=cov, mount=mount)
