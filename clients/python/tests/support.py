"""Shared test support: the stubs generated from the current .proto files,
the Go programs built once, and a real reckond on a free loopback port.

Importing this module runs gen.sh (so that the tests always use stubs true
to the .proto files) and puts clients/python on sys.path.
"""

import atexit
import json
import os
import shutil
import socket
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

PYTHON_DIR = Path(__file__).resolve().parents[1]
REPO = PYTHON_DIR.parents[1]
SAMPLES = REPO / "testdata" / "samples" / "greenhouse-10s.jsonl"
CART_YAML = REPO / "testdata" / "robots" / "free-wheel-turn.yaml"

subprocess.run(["bash", str(PYTHON_DIR / "gen.sh")], check=True, stdout=subprocess.DEVNULL,
               env={**os.environ, "PYTHON": sys.executable})
if str(PYTHON_DIR) not in sys.path:
    sys.path.insert(0, str(PYTHON_DIR))

from google.protobuf import json_format  # noqa: E402

import reckonpy  # noqa: E402
from reckonpy import pb  # noqa: E402

_bin_lock = threading.Lock()
_bin_dir = None


def _go() -> str:
    go = shutil.which("go") or "/usr/local/go/bin/go"
    if not os.path.exists(go):
        raise RuntimeError("the tests build reckond and need a Go toolchain on PATH")
    return go


def binary(name: str) -> str:
    """binary returns the path of the Go program name ("reckond" or
    "reckon"), built once per test run into a temporary directory."""
    global _bin_dir
    with _bin_lock:
        if _bin_dir is None:
            _bin_dir = tempfile.mkdtemp(prefix="reckonpy-bin-")
            atexit.register(shutil.rmtree, _bin_dir, True)
        path = os.path.join(_bin_dir, name)
        if not os.path.exists(path):
            pkg = {"reckond": "./server/cmd/reckond", "reckon": "./clients/cmd/reckon"}[name]
            subprocess.run([_go(), "build", "-o", path, pkg], cwd=REPO, check=True)
        return path


def free_port() -> int:
    """free_port returns a TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Daemon:
    """Daemon is a reckond on a free loopback port with a journal in a
    temporary directory; stop() ends it and removes the directory."""

    def __init__(self, *extra_args: str):
        self.dir = tempfile.mkdtemp(prefix="reckonpy-test-")
        self.port = free_port()
        self.address = f"127.0.0.1:{self.port}"
        self.log = open(os.path.join(self.dir, "reckond.log"), "w+")
        self.proc = subprocess.Popen(
            [binary("reckond"), "-listen", self.address, "-journal", os.path.join(self.dir, "journal"),
             "-log-level", "warn", *extra_args],
            stdout=self.log, stderr=subprocess.STDOUT)

    def wait_listening(self, timeout_s: float = 30.0) -> None:
        """wait_listening returns once reckond accepts connections, and
        raises with its log if it exits or does not listen in time."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                break
            try:
                socket.create_connection(("127.0.0.1", self.port), timeout=1).close()
                return
            except OSError:
                time.sleep(0.02)
        self.log.seek(0)
        raise RuntimeError("reckond did not come up:\n" + self.log.read())

    def connect(self, **kw) -> "reckonpy.Client":
        """connect returns a Client of this daemon, once it listens."""
        self.wait_listening()
        return reckonpy.connect(self.address, **kw)

    def stop(self) -> None:
        self.proc.terminate()
        try:
            self.proc.wait(15)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        self.log.close()
        shutil.rmtree(self.dir, ignore_errors=True)


def read_samples(path=SAMPLES):
    """read_samples returns the reckon.v1.Sample of every line of a JSON
    Lines file (blank lines and # comments skipped), in order."""
    out = []
    with open(path) as f:
        for line in f:
            line = line.strip()
            if line and not line.startswith("#"):
                out.append(json_format.Parse(line, pb.samples_pb2.Sample()))
    return out


def write_samples(path, samples) -> None:
    """write_samples writes samples as JSON Lines."""
    with open(path, "w") as f:
        for s in samples:
            f.write(json.dumps(json_format.MessageToDict(s, preserving_proto_field_name=True)) + "\n")


def stamp_ns(sample) -> int:
    """stamp_ns returns a sample's stamp, nanoseconds."""
    return getattr(sample, sample.WhichOneof("sample")).stamp_ns


def cart_config():
    """cart_config returns the RobotConfig of testdata/robots/free-wheel-turn.yaml,
    written out here in protojson (the YAML loader is Go's)."""
    wheel = {"counts_per_m": 40000, "counter_bits": 16}
    return json_format.ParseDict({
        "wheels": [
            {"name": "left", "x_m": 0.0, "y_m": 0.12, "direction_rad": 0.0, **wheel},
            {"name": "right", "x_m": 0.0, "y_m": -0.12, "direction_rad": 0.0, **wheel},
            {"name": "lateral", "x_m": -0.08, "y_m": 0.0, "direction_rad": 1.5707963267948966, **wheel},
        ],
        "imu_mode": "IMU_MODE_ABSOLUTE",
        "noise": {"wheel_var_m2_per_m": 2.5e-5, "imu_heading_var_rad2": 2.5e-5, "imu_offset_var_rad2_per_s": 1.0e-7},
        "gate_probability": 0.99,
        "window_ns": "1000000000",
        "recovery": {"enabled": True, "count": 3},
        "start_pose": {"x_m": 0, "y_m": 0, "heading_rad": 0},
        "start_covariance": {"dimension": 3, "values": [0.0025, 0, 0, 0, 0.0025, 0, 0, 0, 0.0012]},
        "landmarks": [{"id": "post-w0", "x_m": -1.2, "y_m": 0.0}, {"id": "post-e0", "x_m": 9.2, "y_m": 0.0}],
        "sensors": [
            {"id": "camera", "kind": "FIX_KIND_POSE", "mount": {"x_m": 0.15},
             "covariance": {"dimension": 3, "values": [9.0e-4, 0, 0, 0, 9.0e-4, 0, 0, 0, 4.0e-4]}},
            {"id": "post-camera", "kind": "FIX_KIND_LANDMARK", "mount": {"x_m": 0.15},
             "covariance": {"dimension": 2, "values": [4.0e-4, 0, 0, 1.0e-4]}},
        ],
    }, pb.robot_pb2.RobotConfig())


class Collector(threading.Thread):
    """Collector is a thread appending every Verdict of an IngestSession to
    verdicts as it arrives; error is what ended the stream, if not its end."""

    def __init__(self, session):
        super().__init__(daemon=True)
        self.session, self.verdicts, self.error = session, [], None
        self.start()

    def run(self):
        try:
            for v in self.session.verdicts():
                self.verdicts.append(v)
        except Exception as err:  # reported by the test that reads it
            self.error = err

    def finish(self, timeout_s=60):
        """finish closes the session, waits for its last verdict and
        returns the verdicts, raising what ended the stream early."""
        self.session.close()
        self.join(timeout_s)
        if self.is_alive():
            raise TimeoutError("the ingest stream did not end")
        if self.error is not None:
            raise self.error
        return self.verdicts


def arrival_verdicts(verdicts):
    """arrival_verdicts returns the first Verdict of each client sequence (its
    answer on arrival), in the order they came."""
    seen, out = set(), []
    for v in verdicts:
        if v.client_sequence is not None and v.client_sequence not in seen:
            seen.add(v.client_sequence)
            out.append(v)
    return out
