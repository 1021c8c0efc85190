package client_test

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"math"

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
	p, err := c.API().GetPoseAt(ctx, &pb.GetPoseAtRequest{Robot: "robots/cart", StampNs: 1e9})
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Printf("x %.3f m, y %.3f m, heading %.1f deg\n", p.GetPose().GetPose().GetXM(), p.GetPose().GetPose().GetYM(), p.GetPose().GetPose().GetHeadingRad()*180/math.Pi)
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
