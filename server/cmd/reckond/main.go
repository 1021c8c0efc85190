// Command reckond is the reckon pose estimation service: FusionService over
// gRPC, with a journal per robot, restored on start.
//
//	reckond [-listen 127.0.0.1:7460] [-journal DIR] [-robot ID=CONFIG.yaml ...] [-view 127.0.0.1:7470] [flags]
package main

import (
	"bytes"
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"os"
	"os/signal"
	"strings"
	"syscall"
	"time"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
	"reckon.example/server/convert"
	"reckon.example/server/daemon"
	"reckon.example/server/journal"
)

func main() {
	// SIGHUP (the terminal closed, or an operator who expects a reload)
	// stops the service gracefully as SIGTERM does: unhandled, it ended
	// the process at once, without a word or a graceful stop. Under nohup
	// (SIGHUP ignored) it stays ignored: Notify would install a handler in
	// the ignore's place (os/signal), and the closing terminal would stop
	// the service that nohup was to keep. So does an ignored SIGINT (a
	// service started in the background by a script: Ctrl-C in the
	// script's terminal is not for it).
	sigs := []os.Signal{syscall.SIGTERM}
	for _, sig := range []os.Signal{os.Interrupt, syscall.SIGHUP} {
		if !signal.Ignored(sig) {
			sigs = append(sigs, sig)
		}
	}
	ctx, stop := signal.NotifyContext(context.Background(), sigs...)
	defer stop()
	if err := run(ctx, os.Args[1:], os.Stdout, os.Stderr); err != nil {
		fmt.Fprintln(os.Stderr, "reckond:", err)
		os.Exit(1)
	}
}

// robotFlags collects -robot ID=FILE.
type robotFlags map[string]string

func (r robotFlags) String() string { return fmt.Sprint(map[string]string(r)) }
func (r robotFlags) Set(v string) error {
	id, file, ok := strings.Cut(v, "=")
	if !ok || !journal.ValidID(id) {
		return fmt.Errorf("want ID=CONFIG.yaml with ID of lower-case letters, digits and hyphens, got %q", v)
	}
	if was, ok := r[id]; ok {
		return fmt.Errorf("robot %s is given twice (%s=%s)", id, id, was)
	}
	r[id] = file
	return nil
}

// maxSegmentBytes bounds -segment-bytes well inside what a journal scan
// reads of a segment into memory (1 GiB): a segment may pass the size by a
// batch and its reserve.
const maxSegmentBytes = 512 << 20

// maxMessageBytes bounds -max-message-bytes: half a journal record, so
// that a sample always fits its record (server.ServiceOptions).
const maxMessageBytes = journal.MaxRecordBytes / 2

func run(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("reckond", flag.ContinueOnError)
	// The usage goes to standard output for -h, which is no failure, and
	// with the error to standard error for a bad flag.
	var usage bytes.Buffer
	fs.SetOutput(&usage)
	fs.Usage = func() {
		// The flag package wrote a bad flag's error first; run returns it,
		// and main prints it once.
		usage.Reset()
		fmt.Fprintln(&usage, "usage: reckond [-listen 127.0.0.1:7460] [-journal DIR] [-robot ID=CONFIG.yaml ...] [-view 127.0.0.1:7470] [flags]\n\nflags:")
		fs.PrintDefaults()
	}
	listen := fs.String("listen", "127.0.0.1:7460", "gRPC listen address (loopback by default)")
	journal := fs.String("journal", "reckon-journal", "journal directory (empty: keep no journal)")
	fsync := fs.String("fsync", "interval", "journal fsync policy: each (before every verdict) or interval")
	syncEvery := fs.Duration("fsync-interval", 100*time.Millisecond, "fsync interval for -fsync interval")
	segment := fs.Int64("segment-bytes", 64<<20, "rotate journal segments past this size")
	verifyRate := fs.Int64("verify-mib-per-s", server.DefaultVerifyBytesPerSecond>>20, "read the journal history that a restart did not read, once serving, at most this many MiB a second")
	snapshotEvery := fs.Int("snapshot-every", 20000, "write a robot's state into its journal every this many inputs")
	cert := fs.String("tls-cert", "", "server certificate PEM file (turns TLS on)")
	key := fs.String("tls-key", "", "server key PEM file")
	clientCA := fs.String("tls-client-ca", "", "CA PEM file; clients must present a certificate it signed (mutual TLS)")
	tokenFile := fs.String("token-file", "", "file holding the bearer token every client must send")
	metrics := fs.String("metrics-listen", "", "serve Prometheus metrics on this address at /metrics (off by default; \":PORT\" binds loopback)")
	view := fs.String("view", "", "serve the live view, a page showing every robot live, on this address (off by default; \":PORT\" binds loopback)")
	insecure := fs.Bool("insecure", false, "allow plain text on an address that is not loopback (-listen without TLS, -metrics-listen, -view without TLS and a token)")
	maxStreams := fs.Uint("max-streams", 1024, "concurrent streams per connection")
	var lim server.Limits
	fs.IntVar(&lim.MaxRobots, "max-robots", 1000, "robots in all")
	fs.IntVar(&lim.MaxStringBytes, "max-string-bytes", 128, "longest session_id, sensor_id, landmark_id, pose fix marker and boot_id")
	fs.IntVar(&lim.MaxWatchersPerRobot, "max-watchers-per-robot", 64, "open watch streams per robot")
	fs.IntVar(&lim.MaxWatchers, "max-watchers", 1024, "open watch streams in all")
	fs.IntVar(&lim.MaxViewers, "max-viewers", 16, "open live view pages (event streams) in all")
	fs.IntVar(&lim.MaxIngestStreams, "max-ingest-streams", 2048, "open ingest streams in all")
	fs.IntVar(&lim.MaxConnections, "max-connections", 2048, "open gRPC connections in all; one more is closed at once")
	fs.IntVar(&lim.MaxHTTPConnections, "max-http-connections", 64, "open connections of each HTTP listener (-metrics-listen, -view), each on its own; one more is closed at once; more than -max-viewers")
	fs.IntVar(&lim.MaxPendingBytes, "max-pending-bytes", server.DefaultMaxPendingBytes, "bytes of ingest requests received and not yet taken, all streams together; past it a stream waits before receiving more and its client's sends block (nothing is refused)")
	maxMsg := fs.Int("max-message-bytes", 64<<10, "largest message taken: a larger one is refused alone, one past twice this ends its stream (at most 2 MiB, half a journal record)")
	level := fs.String("log-level", "info", "debug, info, warn or error")
	robots := robotFlags{}
	fs.Var(robots, "robot", "create robot ID from a YAML configuration if the journal does not restore it; a restored robot keeps its journal's, and a differing file is logged (repeatable)")
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			_, err := usage.WriteTo(stdout)
			return err
		}
		usage.WriteTo(stderr)
		return err
	}
	var lv slog.Level
	if err := lv.UnmarshalText([]byte(*level)); err != nil {
		return fmt.Errorf("log-level: %w", err)
	}
	if *maxStreams == 0 || *maxStreams > 1<<20 {
		return fmt.Errorf("max-streams: %d is not between 1 and %d", *maxStreams, 1<<20)
	}
	// A value out of its range was taken as the default before, in
	// silence: -max-watchers 0 meant 1024, -segment-bytes 100 a segment
	// file per batch.
	for _, b := range []struct {
		name      string
		v, lo, hi int64
	}{
		{"segment-bytes", *segment, 1 << 20, maxSegmentBytes},
		{"verify-mib-per-s", *verifyRate, 1, 1 << 20},
		{"snapshot-every", int64(*snapshotEvery), 1, 1 << 30},
		{"max-robots", int64(lim.MaxRobots), 1, 1 << 20},
		{"max-string-bytes", int64(lim.MaxStringBytes), 16, 1 << 16},
		{"max-watchers-per-robot", int64(lim.MaxWatchersPerRobot), 1, 1 << 20},
		{"max-watchers", int64(lim.MaxWatchers), 1, 1 << 20},
		{"max-viewers", int64(lim.MaxViewers), 1, 1 << 16},
		{"max-ingest-streams", int64(lim.MaxIngestStreams), 1, 1 << 20},
		{"max-connections", int64(lim.MaxConnections), 1, 1 << 20},
		{"max-http-connections", int64(lim.MaxHTTPConnections), 2, 1 << 20},
		{"max-message-bytes", int64(*maxMsg), 1 << 10, maxMessageBytes},
		{"max-pending-bytes", int64(lim.MaxPendingBytes), 1 << 20, 1 << 36},
		{"fsync-interval", int64(*syncEvery), int64(time.Millisecond), int64(time.Minute)},
	} {
		if b.v < b.lo || b.v > b.hi {
			if b.name == "fsync-interval" {
				return fmt.Errorf("%s: %v is not between %v and %v", b.name, time.Duration(b.v), time.Duration(b.lo), time.Duration(b.hi))
			}
			return fmt.Errorf("%s: %d is not between %d and %d", b.name, b.v, b.lo, b.hi)
		}
	}
	if *view != "" && lim.MaxHTTPConnections <= lim.MaxViewers {
		// Each page's event stream holds a connection of the view.
		return fmt.Errorf("max-http-connections: %d is not more than -max-viewers (%d): the live view could not serve all its viewers and a page besides", lim.MaxHTTPConnections, lim.MaxViewers)
	}
	dc := daemon.Config{Listen: *listen, TLSCert: *cert, TLSKey: *key, TLSClientCA: *clientCA, MetricsListen: *metrics, ViewListen: *view, MaxMessageBytes: *maxMsg,
		Insecure: *insecure, MaxStreams: uint32(*maxStreams),
		Options: server.Options{JournalDir: *journal, SyncInterval: *syncEvery, SegmentBytes: *segment, VerifyBytesPerSecond: *verifyRate << 20, SnapshotEvery: *snapshotEvery, Limits: lim,
			Logger: slog.New(slog.NewTextHandler(stderr, &slog.HandlerOptions{Level: lv}))},
		Robots: map[string]*pb.RobotConfig{}}
	switch *fsync {
	case "each":
		dc.SyncEach = true
	case "interval":
	default:
		return fmt.Errorf("fsync: %q is not each or interval", *fsync)
	}
	if *tokenFile != "" {
		b, err := daemon.ReadFlagFile(*tokenFile)
		if err != nil {
			return fmt.Errorf("token-file: %w", err)
		}
		if dc.Token = strings.TrimSpace(string(b)); dc.Token == "" {
			return fmt.Errorf("token-file: %s is empty", *tokenFile)
		}
	}
	for id, file := range robots {
		b, err := daemon.ReadFlagFile(file)
		if err != nil {
			return fmt.Errorf("robot %s: %w", id, err)
		}
		c, _, err := convert.LoadConfigYAML(b)
		if err != nil {
			return fmt.Errorf("robot %s: %s: %w", id, file, err)
		}
		dc.Robots[id] = c
	}
	return daemon.Serve(ctx, dc)
}
