"""Tests of the sample builders and the camera geometry (no service)."""

import math
import os
import random
import unittest

import support  # first: generates the stubs and puts reckonpy on sys.path

import reckonpy
from reckonpy import pb

TOL = 1e-12  # absolute, metres and radians: the cases are a few exact operations


class GeometryTest(unittest.TestCase):
    def assertPose(self, got, want):
        for g, w, name in zip(got, want, ("x_m", "y_m", "heading_rad")):
            self.assertAlmostEqual(g, w, delta=TOL, msg=f"{name}: got {got}, want {want}")

    def test_camera_pose_from_marker_hand_computed(self):
        # Hand computed: the marker is mapped at (4, 2) with its face pointing
        # +y (heading pi/2). The camera sees it 2 m ahead, face-on (yaw pi):
        # the camera stands 2 m out from the face, at (4, 4), looking -y.
        # Seen 2 m ahead and 1 m to the left instead, the camera (whose left
        # is +x when it looks -y) stands at (3, 4).
        marker = (4.0, 2.0, math.pi / 2)
        self.assertPose(reckonpy.camera_pose_from_marker(marker, (2.0, 0.0, math.pi)), (4.0, 4.0, -math.pi / 2))
        self.assertPose(reckonpy.camera_pose_from_marker(marker, (2.0, 1.0, math.pi)), (3.0, 4.0, -math.pi / 2))
        # Hand computed: a marker at the field origin with heading 0, seen 1 m
        # ahead with yaw pi/2 (its face points to the camera's left): the
        # camera's left is field +x, so the camera looks along -y (heading
        # -pi/2), and the marker 1 m ahead puts it at (0, 1).
        self.assertPose(reckonpy.camera_pose_from_marker((0.0, 0.0, 0.0), (1.0, 0.0, math.pi / 2)), (0.0, 1.0, -math.pi / 2))

    def test_inverse_and_compose(self):
        rng = random.Random(1)
        for _ in range(100):
            p = (rng.uniform(-10, 10), rng.uniform(-10, 10), rng.uniform(-math.pi, math.pi))
            q = (rng.uniform(-10, 10), rng.uniform(-10, 10), rng.uniform(-math.pi, math.pi))
            self.assertPose(reckonpy.compose(p, reckonpy.inverse(p)), (0.0, 0.0, 0.0))
            # Going out along q and back along its inverse returns to p
            # (compared to 1e-9: a few roundings of 10 m lengths).
            back = reckonpy.compose(reckonpy.compose(p, q), reckonpy.inverse(q))
            for g, w in zip(back, p):
                self.assertAlmostEqual(g, w, delta=1e-9)

    def test_wrap(self):
        self.assertEqual(reckonpy.wrap(-math.pi), math.pi)
        self.assertAlmostEqual(reckonpy.wrap(3 * math.pi / 2), -math.pi / 2, delta=TOL)
        self.assertAlmostEqual(reckonpy.wrap(0.25), 0.25, delta=TOL)

    def test_optical_to_planar_hand_computed(self):
        # Hand computed: a level camera sees a marker face-on (the marker's
        # x along image right, y along image up, z out of its face towards
        # the camera), 2 m along the optical axis, 1 m to the image's left
        # (optical x = -1) and 0.3 m below the axis (optical y = +0.3,
        # dropped): planar (2 forward, 1 left), facing back (yaw pi).
        face_on = [[1, 0, 0], [0, -1, 0], [0, 0, -1]]
        self.assertPose(reckonpy.optical_to_planar(face_on, (-1.0, 0.3, 2.0)), (2.0, 1.0, math.pi))
        # Hand computed: the same marker turned so that its face points to
        # the camera's left (optical -x): yaw pi/2.
        left = [[0, 0, -1], [0, -1, 0], [-1, 0, 0]]
        self.assertPose(reckonpy.optical_to_planar(left, (0.0, 0.0, 3.0)), (3.0, 0.0, math.pi / 2))


class BuilderTest(unittest.TestCase):
    def test_fix_from_camera(self):
        # The first hand-computed case above, through a 3-D detection, a
        # camera mounted 0.15 m ahead of the body origin.
        marker_in_camera = reckonpy.optical_to_planar([[1, 0, 0], [0, -1, 0], [0, 0, -1]], (-1.0, 0.3, 2.0))
        s = reckonpy.fix_from_camera(7_000_000, "camera", (4.0, 2.0, math.pi / 2), marker_in_camera,
                                     reckonpy.diag(0.0009, 0.0009, 0.0004), mount=(0.15, 0.0, 0.0))
        self.assertEqual(s.WhichOneof("sample"), "fix")
        self.assertEqual(s.fix.WhichOneof("measurement"), "pose")
        self.assertEqual((s.fix.stamp_ns, s.fix.sensor_id), (7_000_000, "camera"))
        self.assertAlmostEqual(s.fix.pose.x_m, 3.0, delta=TOL)
        self.assertAlmostEqual(s.fix.pose.y_m, 4.0, delta=TOL)
        self.assertAlmostEqual(s.fix.pose.heading_rad, -math.pi / 2, delta=TOL)
        self.assertEqual((s.fix.mount.x_m, s.fix.mount.y_m, s.fix.mount.heading_rad), (0.15, 0.0, 0.0))
        self.assertEqual(s.fix.covariance.dimension, 3)
        self.assertEqual(list(s.fix.covariance.values), [0.0009, 0, 0, 0, 0.0009, 0, 0, 0, 0.0004])

    def test_fix_names_its_marker(self):
        # The marker's name rides in the pose fix (PoseFix.marker); none
        # given leaves it empty, unknown.
        s = reckonpy.fix_from_camera(1, "camera", (4.0, 2.0, 0.0), (2.0, 0.0, math.pi),
                                     reckonpy.diag(0.0009, 0.0009, 0.0004), marker="row-end-e")
        self.assertEqual(s.fix.pose.marker, "row-end-e")
        plain = reckonpy.pose_fix(1, "camera", 0.0, 0.0, 0.0, reckonpy.diag(0.0009, 0.0009, 0.0004))
        self.assertEqual(plain.fix.pose.marker, "")

    def test_landmark_fix_from_camera(self):
        # Hand computed: a marker 2 m ahead and 1 m left is sqrt(5) m away at
        # atan2(1, 2) radians.
        s = reckonpy.landmark_fix_from_camera(1, "camera", "post-w0", (2.0, 1.0, 0.0), reckonpy.diag(0.01, 0.001))
        lm = s.fix.landmark
        self.assertEqual(lm.landmark_id, "post-w0")
        self.assertAlmostEqual(lm.range_m, math.sqrt(5), delta=TOL)
        self.assertAlmostEqual(lm.bearing_rad, math.atan2(1, 2), delta=TOL)
        self.assertEqual(s.fix.covariance.dimension, 2)
        only = reckonpy.landmark_fix_from_camera(1, "camera", "post-w0", (2.0, 1.0, 0.0), [[0.001]], use_range=False)
        self.assertFalse(only.fix.landmark.HasField("range_m"))
        self.assertTrue(only.fix.landmark.HasField("bearing_rad"))
        self.assertEqual(only.fix.covariance.dimension, 1)

    def test_landmark_fix_needs_a_measurement(self):
        with self.assertRaises(ValueError):
            reckonpy.landmark_fix(1, "camera", "post-w0", cov=[[1.0]])

    def test_pose_fix_matches_the_sample_file(self):
        # The example file's fixes, decoded by protobuf's JSON parser, equal
        # the same fixes built with pose_fix.
        fixes = [s for s in support.read_samples() if s.WhichOneof("sample") == "fix"]
        self.assertGreater(len(fixes), 50)
        for s in fixes:
            f = s.fix
            built = reckonpy.pose_fix(f.stamp_ns, f.sensor_id, f.pose.x_m, f.pose.y_m, f.pose.heading_rad,
                                      list(f.covariance.values), mount=(f.mount.x_m, f.mount.y_m, f.mount.heading_rad) if f.HasField("mount") else None)
            self.assertEqual(built, s)

    def test_covariance_shapes(self):
        nested = reckonpy.covariance([[1, 0.5], [0.5, 2]], 2)
        flat = reckonpy.covariance([1, 0.5, 0.5, 2], 2)
        self.assertEqual(nested, flat)
        self.assertEqual(nested, pb.robot_pb2.Covariance(dimension=2, values=[1, 0.5, 0.5, 2]))
        with self.assertRaises(ValueError):
            reckonpy.covariance([1, 2, 3], 2)


class ConnectTest(unittest.TestCase):
    def test_is_loopback(self):
        # The table the Go client's IsLoopback is tested against too
        # (clients/client/security_test.go), so that both accept the same
        # targets.
        path = os.path.join(os.path.dirname(__file__), "..", "..", "..", "testdata", "reference", "loopback-targets.tsv")
        with open(path, encoding="utf-8") as f:
            table = [line.rstrip("\n").split("\t") for line in f if line.strip() and not line.startswith("#")]
        self.assertGreater(len(table), 20)
        for target, want in table:
            self.assertIn(want, ("true", "false"), target)
            self.assertEqual(reckonpy.is_loopback(target), want == "true", target)

    def test_token_refused_in_plain_text_off_loopback(self):
        with self.assertRaisesRegex(ValueError, "plain text"):
            reckonpy.connect("10.0.0.7:7460", token="secret")
        reckonpy.connect("10.0.0.7:7460").close()  # no token: allowed
        reckonpy.connect("127.0.0.1:7460", token="secret").close()

    def test_verdict_labels(self):
        self.assertEqual(reckonpy.verdict_label(pb.fusion_service_pb2.VERDICT_TOO_OLD), "too_old")
        self.assertEqual(reckonpy.verdict_label(pb.fusion_service_pb2.VERDICT_APPLIED), "applied")

    def test_robot_name(self):
        self.assertEqual(reckonpy.robot_name("cart"), "robots/cart")
        self.assertEqual(reckonpy.robot_name("robots/cart"), "robots/cart")


if __name__ == "__main__":
    unittest.main()
