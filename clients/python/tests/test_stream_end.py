"""A session whose service goes away: send() raises the stream's error
instead of queueing samples without bound that nothing will send."""

import unittest

import grpc

import support

import reckonpy
from reckonpy import client as reckon_client


class StreamEndTest(unittest.TestCase):
    def test_send_after_the_service_died(self):
        daemon = support.Daemon()
        self.addCleanup(daemon.stop)
        client = daemon.connect()
        self.addCleanup(client.close)
        client.create_robot("cart", support.cart_config())
        samples = support.read_samples()
        s = client.ingest("cart")
        for x in samples[:100]:
            s.send(x)
        daemon.proc.kill()
        daemon.proc.wait()
        # Before, every send queued: 300,000 of them held some 275 MB.
        with self.assertRaises(grpc.RpcError) as raised:
            for i in range(5000):
                s.send(samples[i % len(samples)])
        self.assertEqual(raised.exception.code(), grpc.StatusCode.UNAVAILABLE)
        self.assertLessEqual(s._queue.qsize(), reckon_client.MAX_QUEUED)
        s.close()  # harmless on an ended stream
        with self.assertRaises(ValueError):
            s.send(samples[0])


if __name__ == "__main__":
    unittest.main()
