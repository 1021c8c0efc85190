package convert

import (
	"strings"
	"testing"
)

// TestGyroScaleYAML: calibration.gyro_scale_std reaches the robot's
// configuration from a YAML file and back to the wire message, and an
// absurd value is refused naming the field.
func TestGyroScaleYAML(t *testing.T) {
	const good = "imu_mode: absolute\ncalibration:\n  gyro_scale_std: 0.03\n"
	msg, cfg, err := LoadConfigYAML([]byte(good))
	if err != nil {
		t.Fatal(err)
	}
	if cfg.Calibration.GyroScaleStd != 0.03 || msg.GetCalibration().GetGyroScaleStd() != 0.03 {
		t.Errorf("gyro_scale_std %v in the configuration, %v in the message; want 0.03", cfg.Calibration.GyroScaleStd, msg.GetCalibration().GetGyroScaleStd())
	}
	if back := ConfigToProto(cfg); back.GetCalibration().GetGyroScaleStd() != 0.03 {
		t.Errorf("back to the wire: %v, want 0.03", back.GetCalibration().GetGyroScaleStd())
	}
	_, _, err = LoadConfigYAML([]byte(strings.Replace(good, "0.03", "3", 1)))
	if err == nil || !strings.Contains(err.Error(), "calibration.gyro_scale_std") {
		t.Errorf("gyro_scale_std 3: %v, want an error naming calibration.gyro_scale_std", err)
	}
}
