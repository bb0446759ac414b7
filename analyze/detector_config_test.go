package analyze

import (
	"strings"
	"testing"
)

func TestDefaultDetectorConfigIsValid(t *testing.T) {
	c := DefaultDetectorConfig()
	if errs := c.Validate("detectors"); len(errs) != 0 {
		t.Fatalf("defaults invalid: %v", errs)
	}
}

func TestDetectorConfigValidate(t *testing.T) {
	tests := []struct {
		name   string
		change func(*DetectorConfig)
		want   []string
	}{
		{"n above m", func(c *DetectorConfig) { c.AirTrapping.N = 7 }, []string{"detectors.air_trapping.n: must be between 1 and m (6)"}},
		{"n zero", func(c *DetectorConfig) { c.AirTrapping.N, c.AirTrapping.ClearN = 0, 1 }, []string{"detectors.air_trapping.n: must be between 1 and m (6)"}},
		{"clear_n above n", func(c *DetectorConfig) { c.AirTrapping.ClearN = 5 }, []string{"detectors.air_trapping.clear_n: must be between 1 and n (4)"}},
		{"clear fraction above one", func(c *DetectorConfig) { c.AirTrapping.ClearFraction = 1.2 }, []string{"detectors.air_trapping.clear_fraction: must be above 0 and at most 1"}},
		{"negative eef", func(c *DetectorConfig) { c.AirTrapping.EEFLPM = -1 }, []string{"detectors.air_trapping.eef_lpm: must be a positive number"}},
		{"high below medium", func(c *DetectorConfig) { c.AirTrapping.HighPEEPiCmH2O = 4 }, []string{"detectors.air_trapping.high_peepi_cmh2o: must be at least medium_peepi_cmh2o (5)"}},
		{"clear slope above slope", func(c *DetectorConfig) { c.RisingPeak.ClearSlopePctPerMin = 2 }, []string{"detectors.rising_peak_pressure.clear_slope_pct_per_min: must be between 0 and slope_pct_per_min (1.5)"}},
		{"min breaths above window", func(c *DetectorConfig) { c.RisingPeak.MinBreaths = 100 }, []string{"detectors.rising_peak_pressure.min_breaths: must be between 3 and window_breaths (96)"}},
		{"plateau limit zero", func(c *DetectorConfig) { c.Limits.HighPlateau.LimitCmH2O = 0 }, []string{"detectors.limits.high_plateau_pressure.limit_cmh2o: must be a positive number"}},
		{"pressure range inverted", func(c *DetectorConfig) { c.Signal.PressureMaxCmH2O = -30 }, []string{"detectors.signal.pressure_max_cmh2o: must be above pressure_min_cmh2o (-20)"}},
		{"several at once", func(c *DetectorConfig) {
			c.Signal.LostAfterS = 0
			c.Signal.ErrorRate = 2
		}, []string{"detectors.signal.lost_after_s: must be a positive number", "detectors.signal.error_rate: must be above 0 and at most 1"}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			c := DefaultDetectorConfig()
			tt.change(&c)
			errs := c.Validate("detectors")
			var got []string
			for _, e := range errs {
				got = append(got, e.Error())
			}
			if strings.Join(got, "\n") != strings.Join(tt.want, "\n") {
				t.Errorf("errors:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(tt.want, "\n"))
			}
		})
	}
}
