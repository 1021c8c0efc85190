"""A Python session's samples sent again after a broken stream: a new
session that resumes the first (its id, numbering on from its last) sends
the last samples again with their own numbers; the service answers each
with its original verdict and takes none twice."""

import unittest

import support

import reckonpy


class ResendTest(unittest.TestCase):
    def cart(self):
        """A daemon of the test's own with the robot cart; a client to it."""
        daemon = support.Daemon()
        self.addCleanup(daemon.stop)
        client = daemon.connect()
        self.addCleanup(client.close)
        client.create_robot("cart", support.cart_config())
        return client

    def test_resend_is_answered_not_applied_again(self):
        client = self.cart()
        samples = support.read_samples()
        first, rest = samples[:-20], samples[-20:]

        a = client.ingest("cart")
        self.assertRegex(a.session_id, r"^[0-9a-f]{32}$")
        collector = support.Collector(a)
        sent = {}  # client_sequence -> sample
        for s in first:
            sent[a.send(s)] = s
        # Each sample's own verdict (a held one's resolution comes apart,
        # without a status code): what a resend is answered with.
        original = {v.client_sequence: v for v in collector.finish() if v.status_code is not None}
        self.assertEqual(a.last, len(first))
        inputs = client.get_robot("cart").input_count
        self.assertEqual(inputs, len(first))

        # The stream broke before the last ten verdicts arrived, as far as
        # the vision process knows: it resumes and sends those again.
        b = client.ingest("cart", resume=(a.session_id, a.last))
        self.assertEqual(b.session_id, a.session_id)
        collector = support.Collector(b)
        again = list(range(a.last - 9, a.last + 1))
        for seq in again:
            b.send_as(seq, sent[seq])
        new = [b.send(s) for s in rest]
        verdicts = [v for v in collector.finish() if v.status_code is not None]
        by_seq = {v.client_sequence: v for v in verdicts}
        for seq in again:
            self.assertEqual(by_seq[seq].sequence, original[seq].sequence, f"client sequence {seq}")
            self.assertEqual(by_seq[seq].verdict, original[seq].verdict, f"client sequence {seq}")
        self.assertEqual(new, list(range(a.last + 1, a.last + 1 + len(rest))))
        self.assertEqual(client.get_robot("cart").input_count, len(samples),
                         "the samples sent again were applied twice, or the new ones not at all")

    def test_not_taken(self):
        paused = reckonpy.Verdict(client_sequence=3, sequence=0, verdict="invalid", final=True, status_code=14,
                                  reason="robot: robots/cart is paused (journal disk full); not applied, resend when it serves")
        bad = reckonpy.Verdict(client_sequence=4, sequence=0, verdict="invalid", final=True, status_code=3)
        held = reckonpy.Verdict(client_sequence=5, sequence=9, verdict="held", final=False, status_code=0)
        self.assertTrue(paused.not_taken)
        self.assertFalse(bad.not_taken)
        self.assertFalse(held.not_taken)

    def test_send_as_refuses_nonsense(self):
        s = self.cart().ingest("cart")
        self.addCleanup(s.cancel)
        with self.assertRaises(ValueError):
            s.send_as(0, support.read_samples()[0])

    def test_send_as_refuses_a_number_not_given(self):
        # A number send() has not given yet: send() gives it later to
        # another sample, which the service then answers with the first
        # one's verdict and does not take. Before, send_as sent it.
        client = self.cart()
        samples = support.read_samples()
        a = client.ingest("cart")
        self.addCleanup(a.cancel)
        a.send(samples[0])
        with self.assertRaisesRegex(ValueError, "client sequence 2 .*last is 1"):
            a.send_as(2, samples[1])
        b = client.ingest("cart", resume=(a.session_id, 5))
        self.addCleanup(b.cancel)
        b.send_as(5, samples[0])  # numbers up to the resumed session's last are its own
        with self.assertRaises(ValueError):
            b.send_as(6, samples[1])


if __name__ == "__main__":
    unittest.main()
