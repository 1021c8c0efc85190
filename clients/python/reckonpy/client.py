"""A connection to the reckon FusionService and its typed calls.

Robots are named "robots/{id}"; every call also takes the bare id. Stamps
are int64 nanoseconds on the robot's time base. Failed calls raise
grpc.RpcError (its code() and details() say what went wrong); a refused
sample is not an error but a verdict with a reason.
"""

from __future__ import annotations

import dataclasses
import ipaddress
import math
import queue
import secrets
import threading
from typing import Iterator, List, Optional, Sequence, Tuple

import grpc

from reckonpy._pb.reckon.v1 import fusion_service_pb2 as fs_pb2
from reckonpy._pb.reckon.v1 import fusion_service_pb2_grpc as fs_grpc
from reckonpy._pb.reckon.v1 import robot_pb2, samples_pb2
from reckonpy.samples import covariance

DEFAULT_ADDRESS = "127.0.0.1:7460"
"""DEFAULT_ADDRESS is where reckond listens by default (loopback only)."""


def robot_name(robot: str) -> str:
    """robot_name returns the resource name "robots/{id}" of robot, given as
    the bare id or already as the resource name."""
    return robot if robot.startswith("robots/") else "robots/" + robot


def verdict_label(verdict: int) -> str:
    """verdict_label returns the label of a reckon.v1.Verdict value: the
    lowercase enum suffix ("applied", "held", "gated", "too_old",
    "invalid")."""
    return fs_pb2.Verdict.Name(verdict)[len("VERDICT_"):].lower()


def is_loopback(address: str) -> bool:
    """is_loopback reports whether a gRPC target names this machine only: a
    unix socket, "localhost", or a loopback IP (127.0.0.0/8, ::1), with or
    without a port and a "dns:///" or "passthrough:///" scheme. Other host
    names are not resolved and count as remote. It accepts the same forms
    as the Go client's IsLoopback (both are tested against
    testdata/reference/loopback-targets.tsv)."""
    if address.startswith(("unix:", "unix-abstract:")):
        return True
    for scheme in ("dns:///", "passthrough:///"):
        if address.startswith(scheme):
            address = address[len(scheme):]
    host = _split_host(address)
    if host is None:
        host = address
    if host == "localhost":
        return True
    host = host.strip("[]")
    if "%" in host:
        return False  # a zone: not an address that Go's net.ParseIP takes
    try:
        ip = ipaddress.ip_address(host)
    except ValueError:
        return False
    if isinstance(ip, ipaddress.IPv6Address) and ip.ipv4_mapped is not None:
        ip = ip.ipv4_mapped
    return ip.is_loopback


def _split_host(address: str) -> Optional[str]:
    """_split_host returns the host of "host:port" or "[host]:port" (the
    port may be empty), or None if address is not of that form: the rules
    of Go's net.SplitHostPort, which the Go client uses."""
    i = address.rfind(":")
    if i < 0:
        return None
    j = k = 0
    if address.startswith("["):
        end = address.find("]")
        if end < 0 or end + 1 != i:
            return None
        host = address[1:end]
        j, k = 1, end + 1
    else:
        host = address[:i]
        if ":" in host:
            return None
    if "[" in address[j:] or "]" in address[k:]:
        return None
    return host


@dataclasses.dataclass(frozen=True)
class TLS:
    """TLS says how to connect with TLS: ca_file is the PEM file of the CA
    that signed the server's certificate; cert_file and key_file are the
    client's certificate and key for mutual TLS (both or neither);
    server_name, if set, is the name to verify instead of the address's
    host."""

    ca_file: str
    cert_file: Optional[str] = None
    key_file: Optional[str] = None
    server_name: Optional[str] = None


@dataclasses.dataclass(frozen=True)
class Verdict:
    """Verdict is what became of one sample sent on an IngestSession.

    client_sequence is the number send() returned for it (the service sends
    a held sample's final verdict only to the stream that sent it, with
    this number). sequence is the robot's arrival number (0 if refused before
    the robot took it). verdict is its label ("applied", "held", "gated",
    "too_old", "invalid"); final is False only for "held", whose final
    verdict comes later. status_code is the google.rpc.Code of the outcome
    (0 OK, 3 INVALID_ARGUMENT, 5 NOT_FOUND, 8 RESOURCE_EXHAUSTED, 9
    FAILED_PRECONDITION, 11 OUT_OF_RANGE, 14 UNAVAILABLE), None for the resolution of a held sample
    (the wire carries none). reason names the field of a refused sample.
    nis is a fix's normalised innovation squared with nis_dimension
    degrees of freedom. events are the reckon.v1.FusionEvent messages the
    sample caused."""

    client_sequence: Optional[int]
    sequence: int
    verdict: str
    final: bool
    status_code: Optional[int]
    reason: str = ""
    nis: float = 0.0
    nis_dimension: int = 0
    events: Tuple = ()

    @property
    def not_taken(self) -> bool:
        """not_taken tells whether the service did not take the sample and
        it should be sent again (IngestSession.send_as) once the robot
        serves: refused UNAVAILABLE (status 14), as when the robot is paused
        because its journal's disk is full."""
        return self.verdict == "invalid" and self.status_code == 14


_CLOSE = object()

# MAX_QUEUED bounds the requests an IngestSession holds that gRPC has not
# yet taken: send() then waits, as the Go client's Send waits on gRPC's
# flow control, instead of queueing without bound while the service is
# slow or gone.
MAX_QUEUED = 256


class IngestSession:
    """IngestSession is one long-lived Ingest stream for one robot.

    send() may be called from one thread while another iterates over
    verdicts() (or over the raw responses, by iterating the session). The
    service answers every sample, in the order sent; a held sample is
    answered "held" and decided later: its final verdict comes on this
    stream, whichever client's input decided it: in the response to that
    input when this session sent it, otherwise in a response of its own
    that answers no sample (client_sequence 0) and carries only final
    verdicts. verdicts() yields each with the client_sequence of the
    sample this session sent.
    close() ends the sending side; the iteration then ends once the
    service has answered everything. Use it as a context manager to close
    it on leaving the block.

    Every request carries the session's random id (session_id) and its
    client sequence, so that a sample sent again is answered with its
    original verdict instead of being applied twice: after a broken stream,
    open a new session with Client.ingest(robot, resume=(old.session_id,
    old.last)) and send the samples whose verdicts did not arrive again
    with send_as(seq, sample). A sample answered "invalid" with status_code
    14 (UNAVAILABLE: the robot paused, as when its journal's disk is full,
    or its journal not written) was not taken: send it again, with send_as
    and its own number, once the robot serves (get_robot's state). One
    answered "invalid" with status_code 8 (RESOURCE_EXHAUSTED) and a reason
    naming -max-message-bytes was larger than the service takes (64 KiB by
    default): the stream goes on; only a request past twice the limit ends
    it. A sample held when its robot is deleted is decided "invalid", its
    reason saying the robot was deleted.

    send() and send_as() wait while MAX_QUEUED requests wait to be sent,
    and raise the stream's grpc.RpcError once the stream has ended (the
    service stopped or went away), as iterating the verdicts does."""

    def __init__(self, stub: fs_grpc.FusionServiceStub, robot: str, metadata,
                 session_id: Optional[str] = None, last: int = 0):
        self._robot = robot_name(robot)
        self._session_id = session_id or secrets.token_hex(16)
        self._queue: "queue.Queue" = queue.Queue(maxsize=MAX_QUEUED)
        self._lock = threading.Lock()
        self._next = last
        self._closed = False
        self._held = {}  # robot sequence -> client_sequence of a sample this session had held
        self._call = stub.Ingest(self._requests(), metadata=metadata)

    def _requests(self):
        while True:
            req = self._queue.get()
            if req is _CLOSE:
                return
            yield req

    @property
    def robot(self) -> str:
        """robot is the resource name of the robot this session feeds."""
        return self._robot

    @property
    def session_id(self) -> str:
        """session_id is the random id every request of the session carries
        (32 hexadecimal digits)."""
        return self._session_id

    @property
    def last(self) -> int:
        """last is the client sequence number of the last sample sent."""
        with self._lock:
            return self._next

    def send(self, sample: samples_pb2.Sample) -> int:
        """send queues one reckon.v1.Sample and returns its client sequence
        number (1, 2, ... or on from a resumed session's last), which its
        verdict carries."""
        with self._lock:
            if self._closed:
                raise ValueError("IngestSession.send: the session is closed")
            self._put(fs_pb2.IngestRequest(robot=self._robot, client_sequence=self._next + 1, sample=sample,
                                           session_id=self._session_id))
            self._next += 1
            return self._next

    def send_as(self, seq: int, sample: samples_pb2.Sample) -> None:
        """send_as sends a sample again with the client sequence number seq
        it had before, in this session or the one it resumes: the service
        answers it with its original verdict if it took it, and takes it
        otherwise. A number past last, which send() has not given yet, is
        refused (ValueError): send() would give it to another sample later,
        and the service would answer that one with this one's verdict."""
        if seq < 1:
            raise ValueError("IngestSession.send_as: client sequence numbers start at 1")
        with self._lock:
            if self._closed:
                raise ValueError("IngestSession.send_as: the session is closed")
            if seq > self._next:
                raise ValueError(f"IngestSession.send_as: client sequence {seq} was never given (last is {self._next});"
                                 " send a new sample with send()")
            self._put(fs_pb2.IngestRequest(robot=self._robot, client_sequence=seq, sample=sample,
                                           session_id=self._session_id))

    def _put(self, req) -> None:
        """_put queues req for gRPC, waiting while the queue is full; it
        raises the call's error once the stream has ended, when nothing
        will take the request any more."""
        while True:
            if self._call.done():
                raise self._call
            try:
                self._queue.put(req, timeout=0.05)
                return
            except queue.Full:
                pass

    def close(self) -> None:
        """close ends the sending side of the stream; verdicts still to come
        can be read. Closing twice is harmless."""
        with self._lock:
            if not self._closed:
                self._closed = True
                try:
                    self._put(_CLOSE)
                except grpc.RpcError:
                    pass  # the stream has ended already

    def cancel(self) -> None:
        """cancel ends the stream at once; verdicts not yet read are lost."""
        self.close()
        self._call.cancel()

    def __iter__(self) -> Iterator[fs_pb2.IngestResponse]:
        """Iterating the session yields the raw reckon.v1.IngestResponse
        messages, in the order of the samples sent."""
        return iter(self._call)

    def verdicts(self) -> Iterator[Verdict]:
        """verdicts yields a Verdict for every sample sent, and a final one
        for each held sample when it is decided (with the client_sequence
        this session gave it), as the responses come. It ends when the service ends the stream after close(),
        and raises grpc.RpcError if the stream fails."""
        for resp in self._call:
            if resp.client_sequence == 0 and resp.verdict == fs_pb2.VERDICT_UNSPECIFIED:
                # A response about no sample of its own (client sequences
                # start at 1) can only carry resolutions.
                yield from self._resolutions(resp)
                continue
            v = verdict_label(resp.verdict)
            if resp.verdict == fs_pb2.VERDICT_HELD:
                self._held[resp.sequence] = resp.client_sequence
            yield Verdict(client_sequence=resp.client_sequence, sequence=resp.sequence, verdict=v,
                          final=resp.verdict != fs_pb2.VERDICT_HELD, status_code=resp.status_code,
                          reason=resp.reason, nis=resp.nis, nis_dimension=resp.nis_dimension,
                          events=tuple(resp.events))
            yield from self._resolutions(resp)

    def _resolutions(self, resp: fs_pb2.IngestResponse) -> Iterator[Verdict]:
        for r in resp.resolved:
            seq = self._held.pop(r.sequence, None)
            yield Verdict(client_sequence=r.client_sequence or seq, sequence=r.sequence,
                          verdict=verdict_label(r.verdict), final=True, status_code=None,
                          reason=r.reason, nis=r.nis)

    def __enter__(self) -> "IngestSession":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is not None:
            self.cancel()
        else:
            self.close()


class Watch:
    """Watch is a subscription to a robot's fused poses. Iterating it yields
    reckon.v1.WatchResponse messages: .pose (a FusedPose), .events since
    the last one, and .skipped, the poses conflated away because the
    watcher was slow. cancel() ends it (the iteration then raises
    grpc.RpcError with code CANCELLED, which poses() swallows)."""

    def __init__(self, call):
        self._call = call

    def __iter__(self) -> Iterator[fs_pb2.WatchResponse]:
        return iter(self._call)

    def poses(self) -> Iterator[fs_pb2.FusedPose]:
        """poses yields only the poses, and ends quietly on cancel()."""
        try:
            for resp in self._call:
                yield resp.pose
        except grpc.RpcError as err:
            if err.code() != grpc.StatusCode.CANCELLED:
                raise

    def cancel(self) -> None:
        """cancel ends the subscription."""
        self._call.cancel()


class Client:
    """Client is a connection to the service; see connect(). Unary calls
    take an optional timeout in seconds (default the client's timeout_s;
    math.inf for none).
    It is safe to use from several threads."""

    def __init__(self, channel: grpc.Channel, metadata: Sequence[Tuple[str, str]], timeout_s: float):
        self._channel = channel
        self._stub = fs_grpc.FusionServiceStub(channel)
        self._md = tuple(metadata)
        self.timeout_s = timeout_s

    @property
    def stub(self) -> fs_grpc.FusionServiceStub:
        """stub is the generated FusionService stub, for what the helpers do
        not cover (pass metadata=client.metadata)."""
        return self._stub

    @property
    def metadata(self) -> Tuple[Tuple[str, str], ...]:
        """metadata is what the client sends with every call (the bearer
        token, if any)."""
        return self._md

    def _unary(self, method, request, timeout):
        t = _deadline(self.timeout_s if timeout is None else timeout, "timeout")
        return method(request, metadata=self._md, timeout=t)

    def wait_ready(self, timeout_s: float = 10.0) -> None:
        """wait_ready blocks until the channel is connected, raising
        grpc.FutureTimeoutError after timeout_s seconds."""
        grpc.channel_ready_future(self._channel).result(timeout=timeout_s)

    def create_robot(self, robot_id: str, config: robot_pb2.RobotConfig, timeout=None) -> robot_pb2.Robot:
        """create_robot creates robots/{robot_id} from config and returns it.
        An existing robot raises grpc.RpcError with ALREADY_EXISTS."""
        rid = robot_id[len("robots/"):] if robot_id.startswith("robots/") else robot_id
        return self._unary(self._stub.CreateRobot, fs_pb2.CreateRobotRequest(robot_id=rid, config=config), timeout).robot

    def get_robot(self, robot: str, timeout=None) -> robot_pb2.Robot:
        """get_robot returns the robot."""
        return self._unary(self._stub.GetRobot, fs_pb2.GetRobotRequest(name=robot_name(robot)), timeout).robot

    def list_robots(self, page_size: int = 0, timeout=None) -> Iterator[robot_pb2.Robot]:
        """list_robots yields every robot in name order, fetching page_size
        per call (0: the service's default)."""
        req = fs_pb2.ListRobotsRequest(page_size=page_size)
        while True:
            resp = self._unary(self._stub.ListRobots, req, timeout)
            yield from resp.robots
            if not resp.next_page_token:
                return
            req.page_token = resp.next_page_token

    def delete_robot(self, robot: str, timeout=None) -> None:
        """delete_robot deletes the robot; the service closes its journal."""
        self._unary(self._stub.DeleteRobot, fs_pb2.DeleteRobotRequest(name=robot_name(robot)), timeout)

    def ingest(self, robot: str, resume: Optional[Tuple[str, int]] = None) -> IngestSession:
        """ingest opens a long-lived IngestSession feeding robot. resume,
        (session_id, last) of an earlier session, continues it: the same id,
        numbers from last + 1, and the final verdicts of its held samples
        decided while no stream of it was open."""
        if resume is None:
            return IngestSession(self._stub, robot, self._md)
        session_id, last = resume
        return IngestSession(self._stub, robot, self._md, session_id=session_id, last=last)

    def watch(self, robot: str, min_interval_ns: int = 0) -> Watch:
        """watch subscribes to robot's fused poses, at most one every
        min_interval_ns nanoseconds (0: every pose, one for each group of
        inputs the robot takes together; negative is refused)."""
        return Watch(self._stub.Watch(fs_pb2.WatchRequest(robot=robot_name(robot), min_interval_ns=min_interval_ns),
                                      metadata=self._md))

    def pose_at(self, robot: str, stamp_ns: int, timeout=None) -> fs_pb2.FusedPose:
        """pose_at returns robot's fused pose at stamp_ns (robot time base):
        the filtered estimate inside the history window, extrapolated a
        little past the newest odometry (pose.extrapolated says so)."""
        req = fs_pb2.GetPoseAtRequest(robot=robot_name(robot), stamp_ns=int(stamp_ns))
        return self._unary(self._stub.GetPoseAt, req, timeout).pose

    def statistics(self, robot: str, timeout=None) -> fs_pb2.RobotStatistics:
        """statistics returns robot's running record: verdict counts,
        per-sensor consistency, slips, gaps, recoveries and trust."""
        return self._unary(self._stub.GetStatistics, fs_pb2.GetStatisticsRequest(robot=robot_name(robot)), timeout).statistics

    def reseed(self, robot: str, stamp_ns: int, x_m: float, y_m: float, heading_rad: float, cov,
               timeout=None) -> fs_pb2.ReseedRobotResponse:
        """reseed restarts robot's estimate from the field pose (x_m, y_m,
        heading_rad) at stamp_ns with cov, its 3x3 covariance (m^2, m*rad,
        rad^2). Samples stamped before stamp_ns are no longer taken. A
        reseed the robot took and refused (stamped too far ahead) is a
        response with its verdict, reason and refusal; one refused before
        it was taken raises grpc.RpcError, whose gRPC status details
        hold the response with its refusal and field (sequence 0)."""
        req = fs_pb2.ReseedRobotRequest(robot=robot_name(robot), reseed=samples_pb2.Reseed(
            stamp_ns=int(stamp_ns), pose=robot_pb2.FloorPose(x_m=x_m, y_m=y_m, heading_rad=heading_rad),
            covariance=covariance(cov, 3)))
        return self._unary(self._stub.ReseedRobot, req, timeout)

    def start_run(self, robot: str, boot_id: str, run: int = 0, pose=None, cov=None,
                  timeout=None) -> fs_pb2.StartRunResponse:
        """start_run begins a new run of robot after its controller restarted
        (its clock starts again): boot_id names the new boot (required, not
        the current run's), run is the new run's number (0: the next one).
        The last run's pose and covariance carry over unless pose, an
        (x_m, y_m, heading_rad) tuple, and cov, its 3x3 covariance, are
        given. A run start out of order (the current run's boot_id again, so
        that a resend starts no second run, or a run number that is not the
        next) raises grpc.RpcError with FAILED_PRECONDITION."""
        rs = samples_pb2.RunStart(boot_id=boot_id, run=int(run))
        if pose is not None:
            x_m, y_m, heading_rad = pose
            rs.pose.CopyFrom(robot_pb2.FloorPose(x_m=x_m, y_m=y_m, heading_rad=heading_rad))
            rs.covariance.CopyFrom(covariance(cov, 3))
        req = fs_pb2.StartRunRequest(robot=robot_name(robot), run_start=rs)
        return self._unary(self._stub.StartRun, req, timeout)

    def close(self) -> None:
        """close closes the connection and every stream on it."""
        self._channel.close()

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def _deadline(timeout_s, name: str) -> Optional[float]:
    """_deadline returns the gRPC timeout for a call's timeout_s seconds:
    None (no deadline) for infinity, which gRPC itself would take as a
    deadline already past; a NaN, zero or negative value is refused (a
    ValueError naming it), gRPC would answer every call DEADLINE_EXCEEDED
    without sending it."""
    t = float(timeout_s)
    if math.isinf(t) and t > 0:
        return None
    if not t > 0:
        raise ValueError(f"{name} must be a positive number of seconds (math.inf for none), got {timeout_s!r}")
    return t


# The keepalive of connect's channels, as the Go client's: a ping after
# KEEPALIVE_TIME_MS without anything received, and the connection given up
# (every call and stream on it UNAVAILABLE) if no answer comes within
# KEEPALIVE_TIMEOUT_MS. Without it a service that stops answering while
# its host keeps the connection open (a stopped or hung process, a
# machine gone behind a router that holds the connection) leaves send(),
# a watch and the verdicts waiting for ever.
KEEPALIVE_TIME_MS = 30_000
KEEPALIVE_TIMEOUT_MS = 10_000


def _channel_options(options: Sequence[Tuple[str, object]]) -> List[Tuple[str, object]]:
    """_channel_options is options after the keepalive defaults, those that
    options does not set itself."""
    given = {k for k, _ in options}
    defaults = [("grpc.keepalive_time_ms", KEEPALIVE_TIME_MS), ("grpc.keepalive_timeout_ms", KEEPALIVE_TIMEOUT_MS),
                # gRPC stops pinging after two pings without data by
                # default: a stream waiting on a silent service is such.
                ("grpc.http2.max_pings_without_data", 0)]
    return [(k, v) for k, v in defaults if k not in given] + list(options)


def _read(path: Optional[str]) -> Optional[bytes]:
    if path is None:
        return None
    with open(path, "rb") as f:
        return f.read()


def connect(address: str = DEFAULT_ADDRESS, token: Optional[str] = None, tls: Optional[TLS] = None,
            timeout_s: float = 10.0, options: Sequence[Tuple[str, object]] = ()) -> Client:
    """connect returns a Client of the service at address ("host:port").

    With tls it connects with TLS (mutual TLS if tls names a client
    certificate); without, in plain text. token, if given, is sent as
    "authorization: Bearer <token>" with every call; it is refused (a
    ValueError) in plain text to an address that is not loopback, where
    anyone on the way could read it. timeout_s is the default deadline of
    unary calls, seconds (math.inf: none; NaN, zero or less is a
    ValueError). options are extra gRPC channel options; those it does not
    set keep connect's keepalive (KEEPALIVE_TIME_MS, KEEPALIVE_TIMEOUT_MS),
    which ends the calls and streams of a service that stops answering
    with UNAVAILABLE. Connecting is lazy: the first call (or wait_ready)
    dials."""
    _deadline(timeout_s, "connect: timeout_s")
    opts = _channel_options(options)
    if tls is not None:
        if (tls.cert_file is None) != (tls.key_file is None):
            raise ValueError("connect: TLS needs both cert_file and key_file, or neither")
        creds = grpc.ssl_channel_credentials(root_certificates=_read(tls.ca_file),
                                             private_key=_read(tls.key_file),
                                             certificate_chain=_read(tls.cert_file))
        if tls.server_name:
            opts.append(("grpc.ssl_target_name_override", tls.server_name))
        channel = grpc.secure_channel(address, creds, options=opts)
    else:
        if token and not is_loopback(address):
            raise ValueError(f"connect: refusing to send a token in plain text to {address}; use tls=TLS(ca_file=...)")
        channel = grpc.insecure_channel(address, options=opts)
    md: List[Tuple[str, str]] = []
    if token:
        md.append(("authorization", "Bearer " + token))
    return Client(channel, md, timeout_s)
