package review

import (
	"os"
	"runtime"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"reckon.example/fusion/fusiontest"
)

// peakRSS returns the process's peak resident set (VmHWM) in MiB, from
// Linux's /proc/self/status.
func peakRSS() float64 {
	b, err := os.ReadFile("/proc/self/status")
	if err != nil {
		return 0
	}
	for _, l := range strings.Split(string(b), "\n") {
		if f := strings.Fields(l); len(f) >= 2 && f[0] == "VmHWM:" {
			kb, _ := strconv.ParseFloat(f[1], 64)
			return kb / 1024
		}
	}
	return 0
}

// cpuSeconds returns the user and system CPU time of the process so far,
// from getrusage(2).
func cpuSeconds() float64 {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano()).Seconds()
}

// BenchmarkReviewHour reviews one hour of the cart at 200 Hz odometry, 100 Hz
// IMU and 10 Hz fixes from its journal: replay, smoothing, exports, figures
// and the HTML report. The journal is written once, outside the timing.
// It reports the peak resident memory of the process as well, and the CPU
// time of one review (user and system, all goroutines), which a machine
// shared with other work changes less than the time per operation.
func BenchmarkReviewHour(b *testing.B) {
	dir, truth := writeRun(b, fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 74, DurationS: 3600, OutlierFraction: 0.05})
	runtime.GC()
	cpu0 := cpuSeconds()
	b.ResetTimer()
	for b.Loop() {
		out := b.TempDir()
		run, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth}, out, Options{TempDir: b.TempDir()})
		if err != nil {
			b.Fatal(err)
		}
		f, _ := os.Create(out + "/report.html")
		if err := WriteHTML(f, "hour", run); err != nil {
			b.Fatal(err)
		}
		f.Close()
	}
	b.ReportMetric((cpuSeconds()-cpu0)/float64(b.N), "cpu-s/op")
	b.ReportMetric(peakRSS(), "peak-RSS-MiB")
}
