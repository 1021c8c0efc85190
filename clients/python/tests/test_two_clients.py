"""End to end: odometry from the Go client (reckon feed) and camera fixes
from Python, into one robot, as a controller bridge and a vision process
would feed it."""

import os
import subprocess
import tempfile
import time
import unittest

import support

import reckonpy

SPLIT_NS = 5_000_000_000  # the Go feed's first file ends with the odometry at 5 s


class GoOdometryPythonFixesTest(unittest.TestCase):
    """The example run split in two: Go feeds the odometry and IMU headings
    up to 5 s; Python sends the camera fixes stamped from 4 to 6 s (those
    past 5 s are held: no odometry covers them yet); Go feeds the rest,
    which decides the held fixes; Python closes its session."""

    @classmethod
    def setUpClass(cls):
        cls.daemon = support.Daemon()
        cls.client = cls.daemon.connect()
        samples = support.read_samples()
        motion = [s for s in samples if s.WhichOneof("sample") != "fix"]
        cls.fixes = [s for s in samples if s.WhichOneof("sample") == "fix"
                     and 4_000_000_000 < s.fix.stamp_ns < 6_000_000_000]
        tmp = tempfile.mkdtemp(prefix="reckonpy-feed-", dir=cls.daemon.dir)
        first, rest = os.path.join(tmp, "first.jsonl"), os.path.join(tmp, "rest.jsonl")
        support.write_samples(first, [s for s in motion if support.stamp_ns(s) <= SPLIT_NS])
        support.write_samples(rest, [s for s in motion if support.stamp_ns(s) > SPLIT_NS])

        cls.go_first = cls.feed("-create", str(support.CART_YAML), first)
        session = cls.client.ingest("cart")
        collector = support.Collector(session)
        cls.sent = {}  # client_sequence -> stamp_ns
        for s in cls.fixes:
            f = s.fix
            fix = reckonpy.pose_fix(f.stamp_ns, f.sensor_id, f.pose.x_m, f.pose.y_m, f.pose.heading_rad,
                                    list(f.covariance.values), mount=(f.mount.x_m, f.mount.y_m, f.mount.heading_rad) if f.HasField("mount") else None)
            cls.sent[session.send(fix)] = f.stamp_ns
        # Every fix answered (applied, gated or held) before the rest of the
        # odometry goes in.
        deadline = time.monotonic() + 30
        while len(collector.verdicts) < len(cls.sent) and time.monotonic() < deadline:
            time.sleep(0.01)
        cls.go_rest = cls.feed(rest)
        cls.verdicts = collector.finish()

    @classmethod
    def feed(cls, *args):
        return subprocess.run([support.binary("reckon"), "feed", "-addr", cls.daemon.address, "-robot", "robots/cart",
                               *args], capture_output=True, text=True, timeout=120)

    @classmethod
    def tearDownClass(cls):
        cls.client.close()
        cls.daemon.stop()

    def test_go_feeds(self):
        for run in (self.go_first, self.go_rest):
            self.assertEqual(run.returncode, 0, run.stderr)
            self.assertIn("samples sent to robots/cart", run.stdout)
            self.assertIn("too_old 0, invalid 0", run.stdout)

    def test_each_fix_answered_on_arrival(self):
        first = support.arrival_verdicts(self.verdicts)
        self.assertEqual([v.client_sequence for v in first], sorted(self.sent))
        held = 0
        for v in first:
            self.assertEqual(v.status_code, 0, v)
            if self.sent[v.client_sequence] > SPLIT_NS:
                self.assertEqual(v.verdict, "held", v)
                held += 1
            else:
                self.assertIn(v.verdict, ("applied", "gated"), v)
        self.assertEqual(held, 10, "fixes every 100 ms from 5.05 to 5.95 s")

    def test_held_fixes_decided(self):
        # The robot decided every fix: the camera's counts hold all of them.
        stats = self.client.statistics("cart")
        (camera,) = [s for s in stats.sensors if s.sensor_id == "camera"]
        self.assertEqual(camera.counts.applied + camera.counts.gated, len(self.fixes))
        self.assertEqual(stats.held, 0)

    # A held fix's final verdict goes to the stream that sent it (here
    # Python's), although Go's odometry decided it.
    def test_held_verdicts_reach_sender(self):
        held = {v.client_sequence for v in self.verdicts if v.verdict == "held"}
        self.assertEqual(len(held), 10)
        decided = {v.client_sequence for v in self.verdicts if v.final and v.client_sequence in held}
        self.assertEqual(decided, held, "held fixes whose final verdict did not reach the Python session")


if __name__ == "__main__":
    unittest.main()
