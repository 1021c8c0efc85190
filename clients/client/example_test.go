package client_test

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"math"

	"google.golang.org/grpc/status"

	"reckon.example/clients/client"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
	"reckon.example/server/daemon"
)

// startService runs a service on a loopback port for the examples.
func startService() (addr string, stop func()) {
	ctx, cancel := context.WithCancel(context.Background())
	ready := make(chan string, 1)
	done := make(chan error, 1)
	go func() {
		done <- daemon.Serve(ctx, daemon.Config{Listen: "127.0.0.1:0", Ready: func(a, _ string) { ready <- a },
			Options: server.Options{Logger: slog.New(slog.NewTextHandler(io.Discard, nil))}})
	}()
	return <-ready, func() { cancel(); <-done }
}

// A differential-drive cart: two encoder wheels 0.4 m apart, no side slip.
func cartConfig() *pb.RobotConfig {
	return &pb.RobotConfig{
		Wheels:     []*pb.EncoderWheel{{Name: "left", YM: 0.2}, {Name: "right", YM: -0.2}},
		NoSideSlip: true,
	}
}

func travel(startNs, stampNs int64, left, right float64) *pb.Sample {
	return &pb.Sample{Sample: &pb.Sample_Odometry{Odometry: &pb.OdometrySample{StartNs: startNs, StampNs: stampNs,
		Motion: &pb.OdometrySample_Travel{Travel: &pb.WheelTravel{TravelM: []float64{left, right}}}}}}
}

// Feed a robot a quarter turn on the spot and read its pose back.
func Example() {
	addr, stop := startService()
	defer stop()
	c, err := client.Dial(addr, client.Options{})
	if err != nil {
		fmt.Println(err)
		return
	}
	defer c.Close()
	ctx := context.Background()
	if _, err := c.CreateRobot(ctx, "cart", cartConfig()); err != nil {
		fmt.Println(err)
		return
	}
	sess, err := c.OpenIngest(ctx, "robots/cart")
	if err != nil {
		fmt.Println(err)
		return
	}
	// Each wheel rolls 0.2 * pi/2 m in opposite directions: a quarter turn.
	arc := 0.2 * math.Pi / 2 / 100
	for k := int64(0); k < 100; k++ {
		resp, err := sess.Apply(travel(k*10e6, (k+1)*10e6, -arc, arc))
		if err != nil || resp.GetVerdict() != pb.Verdict_VERDICT_APPLIED {
			fmt.Println(err, resp.GetReason())
			return
		}
	}
	sess.Close()
	p, err := c.PoseAt(ctx, "robots/cart", 1e9)
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Printf("x %.3f m, y %.3f m, heading %.1f deg\n", p.GetPose().GetXM(), p.GetPose().GetYM(), p.GetPose().GetHeadingRad()*180/math.Pi)
	// Output: x 0.000 m, y 0.000 m, heading 90.0 deg
}

// Watch a robot's poses while another client feeds it.
func ExampleClient_Watch() {
	addr, stop := startService()
	defer stop()
	c, _ := client.Dial(addr, client.Options{})
	defer c.Close()
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	c.CreateRobot(ctx, "cart", cartConfig())
	sess, _ := c.OpenIngest(ctx, "robots/cart")
	n := 0
	for resp, err := range c.Watch(ctx, "robots/cart", 0) {
		if err != nil {
			fmt.Println(err)
			return
		}
		if n == 0 {
			// The first pose is the current estimate; now drive 1 m straight.
			for k := int64(0); k < 10; k++ {
				sess.Apply(travel(k*100e6, (k+1)*100e6, 0.1, 0.1))
			}
		}
		n++
		if resp.GetPose().GetSequence() == 10 {
			fmt.Printf("at %.1f s: x %.2f m, trusted %v\n", float64(resp.GetPose().GetStampNs())*1e-9, resp.GetPose().GetPose().GetXM(), resp.GetPose().GetTrusted())
			return
		}
	}
	// Output: at 1.0 s: x 1.00 m, trusted true
}

// drivenCart starts a service, creates robots/cart on it and feeds it 1 m
// straight ahead in ten 100 ms intervals. stop closes the client and the
// service.
func drivenCart(ctx context.Context) (c *client.Client, stop func(), err error) {
	addr, stopService := startService()
	if c, err = client.Dial(addr, client.Options{}); err != nil {
		stopService()
		return nil, nil, err
	}
	stop = func() { c.Close(); stopService() }
	if err := driveCart(ctx, c); err != nil {
		stop()
		return nil, nil, err
	}
	return c, stop, nil
}

func driveCart(ctx context.Context, c *client.Client) error {
	if _, err := c.CreateRobot(ctx, "cart", cartConfig()); err != nil {
		return err
	}
	sess, err := c.OpenIngest(ctx, "robots/cart")
	if err != nil {
		return err
	}
	for k := int64(0); k < 10; k++ {
		if _, err := sess.Apply(travel(k*100e6, (k+1)*100e6, 0.1, 0.1)); err != nil {
			return err
		}
	}
	return sess.Close()
}

// Read the estimate at a stamp inside the run: half way, the cart was
// half a metre along.
func ExampleClient_PoseAt() {
	ctx := context.Background()
	c, stop, err := drivenCart(ctx)
	if err != nil {
		fmt.Println(err)
		return
	}
	defer stop()
	p, err := c.PoseAt(ctx, "robots/cart", 500e6)
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Printf("at %.1f s: x %.2f m, y %.2f m\n", float64(p.GetStampNs())*1e-9, p.GetPose().GetXM(), p.GetPose().GetYM())
	// Output: at 0.5 s: x 0.50 m, y 0.00 m
}

// Count a robot's inputs by verdict.
func ExampleClient_Statistics() {
	ctx := context.Background()
	c, stop, err := drivenCart(ctx)
	if err != nil {
		fmt.Println(err)
		return
	}
	defer stop()
	st, err := c.Statistics(ctx, "robots/cart")
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Printf("odometry applied %d, gated %d\n", st.GetOdometry().GetApplied(), st.GetOdometry().GetGated())
	// Output: odometry applied 10, gated 0
}

// Put a cart that was carried to the potting bench back on the map.
func ExampleClient_Reseed() {
	ctx := context.Background()
	c, stop, err := drivenCart(ctx)
	if err != nil {
		fmt.Println(err)
		return
	}
	defer stop()
	cov := []float64{1e-4, 0, 0, 0, 1e-4, 0, 0, 0, 1e-4}
	resp, err := c.Reseed(ctx, "robots/cart", 1e9, &pb.FloorPose{XM: 4, YM: 2.5, HeadingRad: math.Pi / 2}, cov)
	if err != nil {
		fmt.Println(err)
		return
	}
	p, _ := c.PoseAt(ctx, "robots/cart", 1e9)
	fmt.Printf("%s: x %.2f m, y %.2f m, heading %.1f deg\n", resp.GetVerdict(), p.GetPose().GetXM(), p.GetPose().GetYM(), p.GetPose().GetHeadingRad()*180/math.Pi)
	// Output: VERDICT_APPLIED: x 4.00 m, y 2.50 m, heading 90.0 deg
}

// Create, look up, list and delete robots; ListRobots fetches the pages
// as the loop goes.
func ExampleClient_ListRobots() {
	addr, stop := startService()
	defer stop()
	c, _ := client.Dial(addr, client.Options{})
	defer c.Close()
	ctx := context.Background()
	for _, id := range []string{"cart-a", "cart-b", "cart-c"} {
		if _, err := c.CreateRobot(ctx, id, cartConfig()); err != nil {
			fmt.Println(err)
			return
		}
	}
	if err := c.DeleteRobot(ctx, "robots/cart-b"); err != nil {
		fmt.Println(err)
		return
	}
	if _, err := c.GetRobot(ctx, "robots/cart-b"); err != nil {
		fmt.Println("cart-b:", status.Code(err))
	}
	for r, err := range c.ListRobots(ctx, 1) {
		if err != nil {
			fmt.Println(err)
			return
		}
		fmt.Println(r.GetName())
	}
	// Output:
	// cart-b: NotFound
	// robots/cart-a
	// robots/cart-c
}

// Send samples from one goroutine while another reads the verdicts, then
// say that no more follow.
func ExampleSession_CloseSend() {
	addr, stop := startService()
	defer stop()
	c, _ := client.Dial(addr, client.Options{})
	defer c.Close()
	ctx := context.Background()
	c.CreateRobot(ctx, "cart", cartConfig())
	sess, err := c.OpenIngest(ctx, "robots/cart")
	if err != nil {
		fmt.Println(err)
		return
	}
	done := make(chan int)
	go func() {
		applied := 0
		for {
			resp, err := sess.Recv()
			if err != nil { // io.EOF once every verdict has come
				done <- applied
				return
			}
			if resp.GetVerdict() == pb.Verdict_VERDICT_APPLIED {
				applied++
			}
		}
	}()
	for k := int64(0); k < 20; k++ {
		sess.Send(travel(k*50e6, (k+1)*50e6, 0.05, 0.05))
	}
	if err := sess.CloseSend(); err != nil {
		fmt.Println(err)
		return
	}
	fmt.Println("applied", <-done)
	// Output: applied 20
}

// A camera process whose fix is held (stamped ahead of the odometry) and
// whose stream ends before the odometry, sent by another client, decides
// it: a session resumed with the same id receives the final verdict.
func ExampleResume() {
	addr, stop := startService()
	defer stop()
	c, _ := client.Dial(addr, client.Options{})
	defer c.Close()
	ctx := context.Background()
	cfg := cartConfig()
	cfg.Sensors = []*pb.FixSensor{{Id: "camera", Kind: pb.FixKind_FIX_KIND_POSE}}
	c.CreateRobot(ctx, "cart", cfg)
	fix := func(stampNs int64, xM float64) *pb.Sample {
		return &pb.Sample{Sample: &pb.Sample_Fix{Fix: &pb.Fix{StampNs: stampNs, SensorId: "camera",
			Measurement: &pb.Fix_Pose{Pose: &pb.PoseFix{XM: xM}},
			Covariance:  &pb.Covariance{Dimension: 3, Values: []float64{1e-3, 0, 0, 0, 1e-3, 0, 0, 0, 1e-3}}}}}
	}
	odo, _ := c.OpenIngest(ctx, "robots/cart")
	for k := int64(0); k < 5; k++ { // 0.5 m straight ahead in 0.5 s
		odo.Apply(travel(k*100e6, (k+1)*100e6, 0.1, 0.1))
	}
	cam, _ := c.OpenIngest(ctx, "robots/cart")
	resp, _ := cam.Apply(fix(800e6, 0.8))
	fmt.Println("fix", resp.GetClientSequence(), resp.GetVerdict())
	cam.Close()
	for k := int64(5); k < 10; k++ {
		odo.Apply(travel(k*100e6, (k+1)*100e6, 0.1, 0.1))
	}
	odo.Close()

	again, _ := c.OpenIngest(ctx, "robots/cart", client.Resume(cam.ID(), cam.Last()))
	resp, _ = again.Apply(fix(1000e6, 1.0))
	fmt.Println("fix", resp.GetClientSequence(), resp.GetVerdict())
	if resp, err := again.Recv(); err == nil && client.OnlyResolutions(resp) {
		for _, r := range resp.GetResolved() {
			fmt.Println("fix", r.GetClientSequence(), "finally", r.GetVerdict())
		}
	}
	again.Close()
	// Output:
	// fix 1 VERDICT_HELD
	// fix 2 VERDICT_APPLIED
	// fix 1 finally VERDICT_APPLIED
}
