"""reckonpy is the Python client of the reckon pose estimation service
(reckon.v1.FusionService over gRPC): connect, create robots, feed samples
through a long-lived ingest session and read back their verdicts, watch a
robot's fused poses, read the estimate at a stamp and the statistics, and
build fixes from a camera's detection of a mapped marker.

The wire types are the generated modules reckonpy.pb.robot_pb2,
reckonpy.pb.samples_pb2 and reckonpy.pb.fusion_service_pb2; generate them
first with clients/python/gen.sh (see clients/python/README.md).

Stamps are int64 nanoseconds on the robot's time base; a fix is stamped
with its capture time on that time base, never with its arrival time.
"""

try:
    from reckonpy._pb.reckon.v1 import fusion_service_pb2, robot_pb2, samples_pb2  # noqa: F401
except ImportError as err:  # pragma: no cover - depends on the checkout
    raise ImportError("reckonpy: the generated stubs are missing or broken; run clients/python/gen.sh ("
                      + str(err) + ")") from err

from reckonpy import pb  # noqa: E402
from reckonpy.client import (  # noqa: E402
    DEFAULT_ADDRESS, TLS, Client, IngestSession, Verdict, Watch, connect, is_loopback, robot_name,
    verdict_label)
from reckonpy.samples import (  # noqa: E402
    NO_MOUNT, camera_pose_from_marker, compose, covariance, diag, fix_from_camera, inverse,
    landmark_fix, landmark_fix_from_camera, optical_to_planar, pose_fix, wrap)

__all__ = [
    "DEFAULT_ADDRESS", "TLS", "Client", "IngestSession", "Verdict", "Watch", "connect", "is_loopback",
    "robot_name", "verdict_label", "NO_MOUNT", "camera_pose_from_marker", "compose", "covariance", "diag",
    "fix_from_camera", "inverse", "landmark_fix", "landmark_fix_from_camera", "optical_to_planar",
    "pose_fix", "wrap", "pb",
]
