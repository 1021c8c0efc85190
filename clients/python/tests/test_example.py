"""The example vision process, run as a user would, against a reckond that
creates the robot from its YAML configuration (-robot)."""

import re
import subprocess
import sys
import unittest

import support

EXAMPLE = support.PYTHON_DIR / "examples" / "vision_feed.py"
DETECTIONS = support.PYTHON_DIR / "examples" / "detections.csv"


class VisionFeedExampleTest(unittest.TestCase):
    @classmethod
    def setUpClass(cls):
        cls.daemon = support.Daemon("-robot", f"cart={support.CART_YAML}")
        cls.daemon.wait_listening()

    @classmethod
    def tearDownClass(cls):
        cls.daemon.stop()

    def run_example(self, *args):
        return subprocess.run([sys.executable, str(EXAMPLE), *args], capture_output=True, text=True, timeout=120)

    def test_vision_feed_with_odometry(self):
        run = self.run_example("-addr", self.daemon.address, "-robot", "cart", "-odometry", str(support.SAMPLES),
                               str(DETECTIONS))
        self.assertEqual(run.returncode, 0, run.stderr)
        m = re.search(r"^(\d+) fixes sent: applied (\d+), gated (\d+), too_old (\d+), invalid (\d+), "
                      r"held without a verdict here (\d+)$", run.stdout, re.M)
        self.assertIsNotNone(m, run.stdout)
        sent, applied, gated, too_old, invalid, held = map(int, m.groups())
        self.assertEqual(sent, 20)
        # The detections come from the same simulated run as the odometry, so
        # nearly all pass the 99% gate; none is too old, invalid or held.
        self.assertGreaterEqual(applied, 18)
        self.assertEqual(applied + gated, sent)
        self.assertEqual((too_old, invalid, held), (0, 0, 0))
        with support.reckonpy.connect(self.daemon.address) as client:
            stats = client.statistics("cart")
        (camera,) = [s for s in stats.sensors if s.sensor_id == "camera"]
        self.assertEqual((camera.counts.applied, camera.counts.gated), (applied, gated))

    def test_help(self):
        run = self.run_example("-h")
        self.assertEqual(run.returncode, 0)
        self.assertIn("capture", run.stdout + run.stderr)


if __name__ == "__main__":
    unittest.main()
