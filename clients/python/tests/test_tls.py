"""connect with TLS and a bearer token against a reckond started with
-tls-cert, -tls-key and -token-file."""

import os
import shutil
import subprocess
import tempfile
import unittest

import grpc

import support

import reckonpy

TOKEN = "greenhouse-cart-token"


def openssl(*args, cwd):
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True)


def make_ca(dir, name):
    """make_ca writes a self-signed CA, name.pem and name.key, into dir."""
    openssl("req", "-x509", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes",
            "-keyout", name + ".key", "-out", name + ".pem", "-days", "2", "-subj", "/CN=" + name, cwd=dir)


@unittest.skipUnless(shutil.which("openssl"), "openssl makes the test certificates (test.sh installs it)")
class TLSTokenTest(unittest.TestCase):
    @classmethod
    def setUpClass(cls):
        cls.certs = tempfile.mkdtemp(prefix="reckonpy-tls-")
        d = cls.certs
        make_ca(d, "ca")
        make_ca(d, "other-ca")
        openssl("req", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes",
                "-keyout", "server.key", "-out", "server.csr", "-subj", "/CN=reckond", cwd=d)
        with open(os.path.join(d, "san.ext"), "w") as f:
            f.write("subjectAltName=IP:127.0.0.1,DNS:reckond.test\n")
        openssl("x509", "-req", "-in", "server.csr", "-CA", "ca.pem", "-CAkey", "ca.key", "-CAcreateserial",
                "-out", "server.pem", "-days", "2", "-extfile", "san.ext", cwd=d)
        with open(os.path.join(d, "token"), "w") as f:
            f.write(TOKEN + "\n")
        cls.daemon = support.Daemon("-tls-cert", os.path.join(d, "server.pem"), "-tls-key", os.path.join(d, "server.key"),
                                    "-token-file", os.path.join(d, "token"))
        cls.daemon.wait_listening()

    @classmethod
    def tearDownClass(cls):
        cls.daemon.stop()
        shutil.rmtree(cls.certs, ignore_errors=True)

    def test_tls_and_token(self):
        with reckonpy.connect(self.daemon.address, token=TOKEN,
                              tls=reckonpy.TLS(ca_file=os.path.join(self.certs, "ca.pem"))) as c:
            c.create_robot("cart", support.cart_config())
            self.assertEqual([r.name for r in c.list_robots()], ["robots/cart"])

    def test_server_name(self):
        tls = reckonpy.TLS(ca_file=os.path.join(self.certs, "ca.pem"), server_name="reckond.test")
        with reckonpy.connect(self.daemon.address, token=TOKEN, tls=tls) as c:
            list(c.list_robots())

    def test_token_required(self):
        with reckonpy.connect(self.daemon.address, tls=reckonpy.TLS(ca_file=os.path.join(self.certs, "ca.pem"))) as c:
            with self.assertRaises(grpc.RpcError) as ctx:
                list(c.list_robots())
            self.assertEqual(ctx.exception.code(), grpc.StatusCode.UNAUTHENTICATED)
        with reckonpy.connect(self.daemon.address, token="wrong",
                              tls=reckonpy.TLS(ca_file=os.path.join(self.certs, "ca.pem"))) as c:
            with self.assertRaises(grpc.RpcError) as ctx:
                list(c.list_robots())
            self.assertEqual(ctx.exception.code(), grpc.StatusCode.UNAUTHENTICATED)

    def test_unknown_ca_refused(self):
        with reckonpy.connect(self.daemon.address, token=TOKEN, timeout_s=5,
                              tls=reckonpy.TLS(ca_file=os.path.join(self.certs, "other-ca.pem"))) as c:
            with self.assertRaises(grpc.RpcError) as ctx:
                list(c.list_robots())
            self.assertEqual(ctx.exception.code(), grpc.StatusCode.UNAVAILABLE)


if __name__ == "__main__":
    unittest.main()
