"""A service that stops answering, and deadlines that are not a number of
seconds: the client raises a clear error instead of waiting for ever or
failing every call as past its deadline."""

import math
import os
import signal
import threading
import unittest
from unittest import mock

import grpc

import support

from reckonpy import client as reckon_client


class StalledServiceTest(unittest.TestCase):
    def test_stalled_service_ends_send_and_watch(self):
        # A reckond stopped with SIGSTOP keeps its connections open (the
        # kernel answers for it) and answers nothing: the keepalive must
        # end the streams. Shortened here so that the test takes seconds
        # (6 s is above reckond's least ping interval, 5 s); connect's own
        # are those of the Go client, 30 s and 10 s. Before, send() waited
        # for ever once MAX_QUEUED requests were queued (over 90 s in the
        # probe), and so did the watch.
        daemon = support.Daemon()
        self.addCleanup(daemon.stop)
        with mock.patch.object(reckon_client, "KEEPALIVE_TIME_MS", 6000), \
                mock.patch.object(reckon_client, "KEEPALIVE_TIMEOUT_MS", 3000):
            client = daemon.connect()
        self.addCleanup(client.close)
        client.create_robot("cart", support.cart_config())
        samples = support.read_samples()
        session = client.ingest("cart")
        collector = support.Collector(session)
        for x in samples[:20]:
            session.send(x)
        watch = client.watch("cart")
        watched = {}

        def watcher():
            try:
                for _ in watch:
                    pass
            except grpc.RpcError as err:
                watched["code"] = err.code()

        def sender():
            try:
                for i in range(1_000_000):
                    session.send(samples[i % len(samples)])
            except grpc.RpcError as err:
                watched["send"] = err.code()

        threads = [threading.Thread(target=watcher, daemon=True), threading.Thread(target=sender, daemon=True)]
        os.kill(daemon.proc.pid, signal.SIGSTOP)
        self.addCleanup(os.kill, daemon.proc.pid, signal.SIGCONT)
        for t in threads:
            t.start()
        for t in threads:
            t.join(120)  # a bound on a hang, not a timing check
        self.assertFalse(any(t.is_alive() for t in threads), "send() or the watch still waits on a stopped service")
        self.assertEqual(watched.get("send"), grpc.StatusCode.UNAVAILABLE)
        self.assertEqual(watched.get("code"), grpc.StatusCode.UNAVAILABLE)
        collector.join(120)
        self.assertIsInstance(collector.error, grpc.RpcError)
        self.assertEqual(collector.error.code(), grpc.StatusCode.UNAVAILABLE)

    def test_options_keep_their_keepalive(self):
        opts = reckon_client._channel_options([("grpc.keepalive_time_ms", 60000)])
        self.assertEqual(dict(opts)["grpc.keepalive_time_ms"], 60000)
        self.assertEqual(dict(opts)["grpc.keepalive_timeout_ms"], reckon_client.KEEPALIVE_TIMEOUT_MS)


class TimeoutTest(unittest.TestCase):
    def test_timeouts(self):
        daemon = support.Daemon()
        self.addCleanup(daemon.stop)
        client = daemon.connect()
        self.addCleanup(client.close)
        client.create_robot("cart", support.cart_config())
        # An infinite timeout is no deadline (gRPC took it as one past:
        # DEADLINE_EXCEEDED at once, the call never sent).
        self.assertEqual(client.get_robot("cart", timeout=math.inf).name, "robots/cart")
        for bad in (math.nan, 0, -1.0, -math.inf):
            with self.assertRaises(ValueError) as raised:
                client.get_robot("cart", timeout=bad)
            self.assertIn("timeout", str(raised.exception))
        with self.assertRaises(ValueError):
            reckon_client.connect(daemon.address, timeout_s=math.nan)
        with reckon_client.connect(daemon.address, timeout_s=math.inf) as c:
            self.assertEqual(c.get_robot("cart").name, "robots/cart")


if __name__ == "__main__":
    unittest.main()
