package review

import (
	"bytes"
	"regexp"
	"strings"
	"testing"

	"golang.org/x/net/html"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
)

// TestReportIDsOfOddSensorNames: a sensor's id is any string but "imu"
// (fusion's checkSensors), and the report names figures after it. Two
// cameras named with a space, quotes, angle brackets and a non-ASCII
// letter, and one whose name keeps the same letters and digits (so that
// dropping the other runes would make the two ids one), give a page whose element ids are valid and unique, whose clip paths all name
// an element of the page, and which holds no element the names spelt
// (before, the first name went into the figure's id and clip path as it
// was: the attribute ended at its quote and a <b> element appeared).
func TestReportIDsOfOddSensorNames(t *testing.T) {
	odd := []string{`cam "a"> <b>é</b>`, "cam:a:b:b"}
	dir, _ := writeRunConfigured(t, fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 74, DurationS: 8},
		func(c *fusion.Config) {
			second := c.Sensors[0]
			c.Sensors[0].ID, second.ID = odd[0], odd[1]
			c.Sensors = append(c.Sensors, second)
		},
		func() func(*pb.Sample) {
			n := 0
			return func(s *pb.Sample) {
				if f := s.GetFix(); f != nil {
					f.SensorId = odd[n%2]
					n++
				}
			}
		}())
	run, err := Analyze(Source{JournalDir: dir, Robot: "cart"}, t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	var page bytes.Buffer
	if err := WriteHTML(&page, "Review of robots/cart", run); err != nil {
		t.Fatal(err)
	}
	// The page parsed as a browser parses it (golang.org/x/net/html
	// implements the WHATWG HTML parsing algorithm).
	doc, err := html.Parse(bytes.NewReader(page.Bytes()))
	if err != nil {
		t.Fatal(err)
	}
	ids := map[string]int{}
	var clips []string
	figures, injected := 0, 0
	urlRef := regexp.MustCompile(`^url\(#(.*)\)$`)
	var walk func(n *html.Node)
	walk = func(n *html.Node) {
		if n.Type == html.ElementNode {
			switch n.Data {
			case "figure":
				figures++
			case "b":
				if n.Parent != nil && n.Parent.Data != "p" {
					injected++ // the report's own <b> stand only in notes
				}
			}
			for _, a := range n.Attr {
				switch a.Key {
				case "id":
					ids[a.Val]++
				case "clip-path":
					m := urlRef.FindStringSubmatch(a.Val)
					if m == nil {
						t.Errorf("clip-path %q is not url(#id)", a.Val)
						continue
					}
					clips = append(clips, m[1])
				}
			}
		}
		for c := n.FirstChild; c != nil; c = c.NextSibling {
			walk(c)
		}
	}
	walk(doc)
	for id, k := range ids {
		// HTML Living Standard, 3.2.6.1 "The id attribute": unique in
		// its tree, at least one character, no ASCII whitespace.
		if id == "" || strings.ContainsAny(id, " \t\n\f\r") || k > 1 {
			t.Errorf("element id %q (%d times) is not a valid unique id", id, k)
		}
	}
	for _, c := range clips {
		if ids[c] != 1 {
			t.Errorf("clip path names %q, which is no element of the page", c)
		}
	}
	if injected > 0 {
		t.Errorf("the page holds %d <b> elements outside notes: a sensor's name was written as markup", injected)
	}
	// The track, the two standard deviations, the IMU offset, the IMU's
	// NIS and one NIS figure per camera.
	if figures != 7 {
		t.Errorf("%d figures in the page, want 7 (ids %v)", figures, ids)
	}
	for _, id := range odd {
		if !strings.Contains(page.String(), "Normalised innovation squared of "+html.EscapeString(id)) {
			t.Errorf("no NIS figure captioned with %q", id)
		}
	}
}

// TestClipIDsDistinct: the clip path ids of two NIS figures stay apart when
// a sensor's id and a run's label share a hyphen at their join: sensor "a"
// in run "b-x" and sensor "a-b" in run "x" gave both
// clip-fig-nis-a-b-x (the review of session 26), two elements of one id
// in a page of both runs.
func TestClipIDsDistinct(t *testing.T) {
	pairs := [][2]string{{"a", "b-x"}, {"a-b", "x"}, {"a-b-x", ""}, {"a_b", "x"}, {"a", "b_x"}}
	seen := map[string][2]string{}
	for _, p := range pairs {
		id := (&Run{Label: p[1]}).clipID("fig-nis-" + idPart(p[0]))
		if q, ok := seen[id]; ok {
			t.Errorf("sensor %q in run %q and sensor %q in run %q share clip id %q", q[0], q[1], p[0], p[1], id)
		}
		seen[id] = p
	}
}
