#!/usr/bin/python3
"""vision_feed is an example vision process: it turns a camera's detections
of mapped markers into pose fixes of the camera and sends them to one
robot over a long-lived ingest session, printing each verdict.

    vision_feed.py [-addr 127.0.0.1:7460] [-robot cart] [-odometry FILE.jsonl] DETECTIONS.csv

DETECTIONS.csv has the columns capture_ns, marker_id, x_m, y_m, yaw_rad:
the marker's planar pose in the camera's frame (x forward, y left, yaw of
the marker's face from the camera's +x), as a detector reports it after
optical_to_planar, and the capture time on the robot's time base.

Clocks. The service orders every input of a robot by its stamp on one
time base: the robot controller's monotonic clock, in which its odometry
is stamped. A fix must carry the time the image was captured (the middle
of the exposure), on that same time base; not the time the detection
finished, and not the time it arrived. A camera stamped at arrival is
wrong by the whole pipeline latency, and at 0.4 m/s 80 ms is 3 cm: the
fixes then pull the estimate back along the track, and the per-sensor
consistency statistics show it only as a wider scatter. So:
  - if the controller triggers the camera, stamp with the controller's
    time of the trigger (best);
  - otherwise stamp with this computer's monotonic clock at capture and
    add the offset to the robot's time base (-clock-offset-ns), measured
    by exchanging stamps with the controller or by a shared clock
    (chrony/PTP) on both; re-measure it, clocks drift apart.
A fix may arrive late: up to the robot's window_ns (default 1 s) behind
the newest odometry it is inserted where it belongs. One stamped ahead of
the odometry is held until odometry reaches it.

With -odometry the example also plays the controller: it feeds the
odometry and IMU headings of a JSON Lines file on a second session, and
sends each detection once the odometry has reached its capture time plus
-latency-ms, as a real vision process's results arrive after the
odometry that covers them. Without it, something else (say `reckon feed`)
feeds the robot.
"""

import argparse
import csv
import gzip
import math
import os
import sys
import threading
import zlib
from collections import Counter

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from google.protobuf import json_format  # noqa: E402

import reckonpy  # noqa: E402
from reckonpy import pb  # noqa: E402

# MARKERS maps each marker to its field pose (x_m, y_m, heading_rad of its
# face's outward normal): here the greenhouse's east row-end, facing west.
MARKERS = {"row-end-e": (9.2, 0.0, math.pi)}
# MOUNT is the camera's pose in the body frame: 0.15 m ahead of the
# reference point, looking forward.
MOUNT = (0.15, 0.0, 0.0)
# COV is the covariance of the camera's field pose from one detection
# (3 cm, 3 cm, 20 mrad standard deviations), m^2 and rad^2.
COV = reckonpy.diag(0.0009, 0.0009, 0.0004)


def read_detections(path, clock_offset_ns):
    """read_detections returns (stamp_ns on the robot's time base,
    marker_id, marker pose in the camera frame) for each row; lines
    starting with # are skipped. A file saved with a UTF-8 byte order mark
    or CRLF line ends (as spreadsheets save CSV) reads as one without. A
    header without one of the columns, or a row whose capture_ns is not an
    integer or whose x_m, y_m or yaw_rad is not a number, raises ValueError
    naming the file, its line and the column."""
    numbers = []  # the file's line number of each line handed to the CSV reader

    def lines(f):
        for n, line in enumerate(f, 1):
            if not line.startswith("#"):
                numbers.append(n)
                yield line

    out = []
    with open(path, newline="", encoding="utf-8-sig") as f:
        rows = csv.DictReader(lines(f))
        missing = [c for c in ("capture_ns", "marker_id", "x_m", "y_m", "yaw_rad") if c not in (rows.fieldnames or [])]
        if missing:
            raise ValueError(f"{path}:{numbers[0] if numbers else 1}: the header lacks the column(s) {', '.join(missing)}")
        for row in rows:
            where = f"{path}:{numbers[rows.line_num - 1]}"
            values = []
            for column, parse in (("capture_ns", int), ("x_m", float), ("y_m", float), ("yaw_rad", float)):
                try:
                    values.append(parse(row[column]))
                except (TypeError, ValueError):
                    what = "an integer" if parse is int else "a number"
                    raise ValueError(f"{where}: {column}: {row[column]!r} is not {what}") from None
            out.append((values[0] + clock_offset_ns, row["marker_id"], tuple(values[1:])))
    return out


def read_samples(path):
    """read_samples returns the reckon.v1.Sample of each line of a JSON Lines
    file as reckon feed reads it: blank lines and # comments skipped, a
    UTF-8 byte order mark at its start and CRLF line ends taken, a gzip
    file (.jsonl.gz) read through its decompression. A line that is not a
    Sample raises ValueError naming the file and its line."""
    with open(path, "rb") as f:
        gz = f.read(2) == b"\x1f\x8b"
    with (gzip.open(path, "rt", encoding="utf-8-sig") if gz else open(path, encoding="utf-8-sig")) as f:
        out = []
        n = 0
        try:
            for n, line in enumerate(f, 1):
                line = line.strip()
                if line and not line.startswith("#"):
                    try:
                        out.append(json_format.Parse(line, pb.samples_pb2.Sample()))
                    except json_format.ParseError as e:
                        raise ValueError(f"{path}:{n}: {e}") from None
        except (EOFError, zlib.error) as e:
            # A gzip file cut short ends in EOFError, a damaged one in
            # zlib.error: neither is an OSError, and neither named the file.
            raise ValueError(f"{path}:{n + 1}: the compressed file is cut short or damaged here ({e}); the lines before it are whole") from None
        except UnicodeDecodeError as e:
            raise ValueError(f"{path}:{n + 1}: not UTF-8 text ({e})") from None
        return out


class Controller:
    """Controller stands in for the robot's controller: it feeds the odometry
    and IMU headings among samples (read_samples of a JSON Lines file), up
    to a stamp, and waits for their verdicts."""

    def __init__(self, client, robot, samples):
        self.session = client.ingest(robot)
        self.samples = [s for s in samples if s.WhichOneof("sample") in ("odometry", "heading")]
        self.next = 0
        self.sent = 0
        self.answered = 0
        self.cond = threading.Condition()
        threading.Thread(target=self._read, daemon=True).start()

    def _read(self):
        seen = set()  # client sequences answered (a held one is answered twice)
        for v in self.session.verdicts():
            if v.client_sequence is not None and v.client_sequence not in seen:
                seen.add(v.client_sequence)
                with self.cond:
                    self.answered += 1
                    self.cond.notify_all()

    def feed_until(self, stamp_ns):
        """feed_until sends the samples stamped up to stamp_ns and returns
        once the service has answered them."""
        while self.next < len(self.samples):
            s = self.samples[self.next]
            if getattr(s, s.WhichOneof("sample")).stamp_ns > stamp_ns:
                break
            self.session.send(s)
            self.next += 1
            self.sent += 1
        with self.cond:
            self.cond.wait_for(lambda: self.answered >= self.sent, timeout=30)

    def close(self):
        self.feed_until(1 << 62)
        self.session.close()


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("-addr", default=reckonpy.DEFAULT_ADDRESS, help="service address host:port")
    ap.add_argument("-robot", default="cart", help="robot id or robots/{id}")
    ap.add_argument("-token-file", help="file holding the bearer token")
    ap.add_argument("-tls-ca", help="PEM file of the CA that signed the server's certificate (turns TLS on)")
    ap.add_argument("-clock-offset-ns", type=int, default=0, help="add to each capture stamp to put it on the robot's time base")
    ap.add_argument("-odometry", help="also feed odometry and IMU headings from this JSON Lines file (a stand-in controller)")
    ap.add_argument("-latency-ms", type=float, default=80, help="with -odometry: how far the odometry runs ahead of each detection")
    ap.add_argument("detections", help="CSV of marker detections")
    args = ap.parse_args(argv)

    token = None
    if args.token_file:
        with open(args.token_file) as f:
            token = f.read().strip()
    tls = reckonpy.TLS(ca_file=args.tls_ca) if args.tls_ca else None
    # Both files are read whole before anything is sent, so that a bad line
    # sends nothing.
    try:
        detections = read_detections(args.detections, args.clock_offset_ns)
        samples = read_samples(args.odometry) if args.odometry else None
    except (OSError, ValueError) as e:
        print(f"vision_feed: {e}", file=sys.stderr)
        return 1
    with reckonpy.connect(args.addr, token=token, tls=tls) as client:
        controller = Controller(client, args.robot, samples) if args.odometry else None
        session = client.ingest(args.robot)
        verdicts = []
        reader = threading.Thread(target=lambda: verdicts.extend(session.verdicts()), daemon=True)
        reader.start()
        sent = 0
        for stamp_ns, marker_id, marker_in_camera in detections:
            if marker_id not in MARKERS:
                print(f"skipping marker {marker_id}: not in the map", file=sys.stderr)
                continue
            if controller:
                controller.feed_until(stamp_ns + int(args.latency_ms * 1e6))
            fix = reckonpy.fix_from_camera(stamp_ns, "camera", MARKERS[marker_id], marker_in_camera, COV, MOUNT,
                                           marker=marker_id)
            session.send(fix)
            sent += 1
        if controller:
            controller.close()
        session.close()
        reader.join()
    final = Counter()
    for v in verdicts:
        if v.client_sequence is None:
            continue
        print(f"fix {v.client_sequence}: {v.verdict}" + (f" nis {v.nis:.2f}" if v.nis_dimension else "")
              + (f" ({v.reason})" if v.reason else ""))
        if v.final:
            final[v.verdict] += 1
    still_held = sent - sum(final.values())
    print(f"{sent} fixes sent: " + ", ".join(f"{k} {final[k]}" for k in ("applied", "gated", "too_old", "invalid"))
          + f", held without a verdict here {still_held}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
