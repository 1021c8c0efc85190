package convert

import (
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"reckon.example/fusion"
)

func TestExampleConfigs(t *testing.T) {
	files, _ := filepath.Glob("../../testdata/robots/*.yaml")
	if len(files) < 3 {
		t.Fatalf("found %d example configurations", len(files))
	}
	for _, f := range files {
		b, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		c, cfg, err := LoadConfigYAML(b)
		if err != nil {
			t.Errorf("%s: %v", f, err)
			continue
		}
		if _, err := fusion.New(cfg); err != nil {
			t.Errorf("%s: %v", f, err)
		}
		if back, err := ConfigFromProto(ConfigToProto(cfg)); err != nil || len(back.Wheels) != len(c.Wheels) {
			t.Errorf("%s: round trip: %v", f, err)
		}
	}
}

func TestConfigYAMLErrors(t *testing.T) {
	cases := []struct {
		name, yaml, want string
	}{
		{"unknown top-level field", "wheels: []\nimu_mode: absolute\nspeed_limit: 3\n", "line 3: unknown field \"speed_limit\""},
		{"unknown nested field", "wheels:\n  - {x_m: 0, y_m: 0.1}\n  - {x_m: 0, y_m: -0.1, diameter_m: 0.05}\n", "line 3: unknown field \"diameter_m\" in wheels[1]"},
		{"bad enum", "imu_mode: sideways\n", "line 1: imu_mode: \"sideways\" is not one of none, absolute, rotation"},
		{"out of range", "wheels:\n  - {y_m: 0.12}\n  - {y_m: -0.12}\n  - {x_m: -0.08, direction_rad: 1.57}\nnoise:\n  wheel_var_m2_per_m: -1\n", "line 6: invalid configuration: noise.wheel_var_m2_per_m"},
		{"out of range in a list", "wheels:\n  - {y_m: 0.12}\n  - {y_m: -0.12, counter_bits: 3}\n  - {x_m: -0.08, direction_rad: 1.57}\n", "line 3: invalid configuration: wheels[1].counter_bits"},
		{"not a mapping", "- 1\n- 2\n", "must be a mapping"},
		{"broken yaml", "wheels: [\n", "robot configuration file"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, _, err := LoadConfigYAML([]byte(c.yaml))
			if err == nil || !errors.Is(err, ErrConfigFile) || !strings.Contains(err.Error(), c.want) {
				t.Errorf("error %v, want one containing %q", err, c.want)
			}
		})
	}
}

// FuzzConfigYAML: any bytes give a configuration that validates or an
// error; never a panic.
func FuzzConfigYAML(f *testing.F) {
	for _, p := range []string{"free-wheel-turn", "drive-wheel-turn"} {
		b, _ := os.ReadFile("../../testdata/robots/" + p + ".yaml")
		f.Add(b)
	}
	f.Fuzz(func(t *testing.T, b []byte) {
		_, cfg, err := LoadConfigYAML(b)
		if err == nil {
			if _, err := fusion.New(cfg); err != nil {
				t.Fatalf("accepted a configuration that fusion refuses: %v", err)
			}
		}
	})
}
