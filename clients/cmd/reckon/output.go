package main

import (
	"encoding/csv"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// poseWriter writes fused poses (and, for replay, verdicts) in a format.
type poseWriter struct {
	format string
	w      io.Writer
	csv    *csv.Writer
	rows   int
}

func newPoseWriter(format string, w io.Writer) (*poseWriter, error) {
	switch format {
	case "table", "csv", "jsonl":
	default:
		return nil, fmt.Errorf("format %q: want table, csv or jsonl", format)
	}
	pw := &poseWriter{format: format, w: w}
	if format == "csv" {
		pw.csv = csv.NewWriter(w)
	}
	return pw, nil
}

var csvHeader = []string{"stamp_ns", "sequence", "x_m", "y_m", "heading_rad", "cov_xx_m2", "cov_xy_m2", "cov_xh_m_rad", "cov_yy_m2", "cov_yh_m_rad", "cov_hh_rad2",
	"position95_m", "heading_std_rad", "forward_m_per_s", "left_m_per_s", "turn_rad_per_s", "imu_offset_rad", "trusted", "distrust", "verdict", "nis", "reason"}

func distrust(p *pb.FusedPose) string {
	var s []string
	for _, d := range p.GetDistrust() {
		s = append(s, convert.DistrustName(d))
	}
	return strings.Join(s, ",")
}

func f64(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }

// pose writes one pose; resp, if set, is the verdict of the input after which
// it was taken.
func (pw *poseWriter) pose(p *pb.FusedPose, resp *pb.IngestResponse) error {
	pw.rows++
	c := p.GetCovariance().GetValues()
	if len(c) != 9 {
		c = make([]float64, 9)
	}
	verdict := ""
	if resp != nil {
		verdict = convert.VerdictName(resp.GetVerdict())
	}
	switch pw.format {
	case "jsonl":
		if resp != nil {
			return convert.WriteJSONLine(pw.w, &pb.JournalOutput{Response: resp, Pose: p})
		}
		return convert.WriteJSONLine(pw.w, p)
	case "csv":
		if pw.rows == 1 {
			if err := pw.csv.Write(csvHeader); err != nil {
				return err
			}
		}
		v := p.GetVelocity()
		rec := []string{strconv.FormatInt(p.GetStampNs(), 10), strconv.FormatUint(p.GetSequence(), 10),
			f64(p.GetPose().GetXM()), f64(p.GetPose().GetYM()), f64(p.GetPose().GetHeadingRad()),
			f64(c[0]), f64(c[1]), f64(c[2]), f64(c[4]), f64(c[5]), f64(c[8]),
			f64(p.GetPosition95M()), f64(p.GetHeadingStdRad()), f64(v.GetForwardMPerS()), f64(v.GetLeftMPerS()), f64(v.GetTurnRadPerS()),
			f64(p.GetImuOffsetRad()), strconv.FormatBool(p.GetTrusted()), distrust(p), verdict, "", ""}
		if resp != nil {
			rec[20], rec[21] = f64(resp.GetNis()), resp.GetReason()
		}
		if err := pw.csv.Write(rec); err != nil {
			return err
		}
		pw.csv.Flush()
		return pw.csv.Error()
	default:
		if pw.rows%25 == 1 {
			fmt.Fprintf(pw.w, "%10s %8s %8s %8s %7s %7s %7s %7s  %-8s %s\n", "t_s", "x_m", "y_m", "head_deg", "sx_m", "sy_m", "sh_deg", "r95_m", "verdict", "trust")
		}
		trust := "trusted"
		if !p.GetTrusted() {
			trust = distrust(p)
		}
		_, err := fmt.Fprintf(pw.w, "%10.3f %8.3f %8.3f %8.1f %7.3f %7.3f %7.2f %7.3f  %-8s %s\n", float64(p.GetStampNs())*1e-9,
			p.GetPose().GetXM(), p.GetPose().GetYM(), p.GetPose().GetHeadingRad()*180/math.Pi,
			math.Sqrt(c[0]), math.Sqrt(c[4]), math.Sqrt(c[8])*180/math.Pi, p.GetPosition95M(), verdict, trust)
		return err
	}
}
